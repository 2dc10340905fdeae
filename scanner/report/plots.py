"""Display data for the report's figures, computed from BinnedStats and disclosure-controlled.

Everything a figure draws is computed here and stored in results.json, so ``cutscan report DIR``
can redraw the report from results.json alone.  Every count stored here is 0 or at least
``min_cell``: display bins are merged with their neighbours (never across the cutoff) until they
are safe, see :mod:`scanner.report.disclosure`.

* ``uptake_plot`` — evenly spaced binned means of the treatment on each side over c ± 2h, with
  the IMSE-optimal number of bins of Calonico, Cattaneo & Titiunik (2015, JASA 110(512)), and the
  local polynomial fits of the estimate with pointwise 95% bands (HC1 sandwich).
* ``density_plot`` — the McCrary (2008) histogram around the cutoff and the fitted one-sided
  densities (the local linear smoother of the histogram heights, evaluated along each side).
* ``sensitivity_plot`` — the jump re-estimated at multiples of the bandwidth (used when the
  scan did not already store a ``sensitivity`` list).
* ``timeline_plot`` — the jump estimated separately in each calendar year (used when the spec
  names a date column and the scan did not already store a ``timeline``).
"""
from __future__ import annotations

import math

import numpy as np

from ..diagnostics.density import mccrary_test
from ..estimate.kernels import kernel as kernel_fn
from ..estimate.local import Z95, _rss, _side_fit, fit_jump, side_data
from .disclosure import is_binary, is_small, merge_sparse

MIN_DISPLAY_BINS = 3      # a side drawn with fewer bins shows no shape (display choice)
MAX_DISPLAY_BINS = 40     # and more than this are unreadable at card size (display choice)
LINE_POINTS = 25
SENSITIVITY_FACTORS = (0.5, 0.75, 1.0, 1.25, 1.5, 2.0)
_EPS = 1e-9


def imse_bins(u, n, s1, s2, reach: float, degree: int = 4) -> float:
    """IMSE-optimal number of evenly spaced bins on one side of the cutoff (unrounded).

    Parameters
    ----------
    u : bin positions relative to the cutoff (running-variable units), one side only.
    n, s1, s2 : rows, Σy and Σy² per bin.
    reach : length R of the plotted side (running-variable units).
    degree : order of the global polynomial pilot (4, as is common for RD plots).

    Returns
    -------
    J* = (R² · mean(μ'(X)²) / (6 σ̄²))^(1/3) · N^(1/3); inf when σ̄² = 0, NaN when not estimable.

    Notes
    -----
    Calonico, Cattaneo & Titiunik (2015), JASA 110(512): the IMSE-optimal number of evenly spaced
    bins grows like N^(1/3).  With J equal bins of width R/J the squared bias of a bin mean is
    about μ'²(R/J)²/12 and its variance σ²J/N (density-weighted IMSE), whose minimiser is J*
    above (docs: METHODS §12).  μ' comes from a global polynomial fit on the side and σ̄² is the
    mean squared residual of that fit, both computed from the bin sums.
    """
    keep = n > 0
    u, n, s1, s2 = u[keep], n[keep], s1[keep], s2[keep]
    N = n.sum()
    if N <= 0 or reach <= 0 or u.size < 2:
        return float("nan")
    p = min(degree, u.size - 1)
    scale = reach
    z = u / scale                      # scaled for a well-conditioned fit
    R = np.vander(z, p + 1, increasing=True)
    A = (R * n[:, None]).T @ R
    try:
        beta = np.linalg.solve(A, R.T @ s1)
    except np.linalg.LinAlgError:
        return float("nan")
    fit = R @ beta
    sigma2 = float(_rss(n, s1, s2, fit).sum() / N)
    dbeta = beta[1:] * np.arange(1, p + 1)
    # Slope in scaled units (dμ/dz = reach·dμ/du), so R²·∫μ'²f is computed without forming R².
    slope_z = np.vander(z, p, increasing=True) @ dbeta
    B_scaled = float((n * slope_z ** 2).sum() / N)
    if sigma2 <= 0:
        return float("inf")
    return float((B_scaled / (6 * sigma2)) ** (1 / 3) * N ** (1 / 3))


def _side_bins(a, n, s1, sx, J, reach, left):
    """Assign bins (by distance a ≥ 0 from the cutoff) to J equal bins of width reach/J."""
    w = reach / J
    # Every bin is closed below and open above in x: [c − (j+1)w, c − jw) on the left,
    # [c + jw, c + (j+1)w) on the right, so each support point falls in exactly one bin; the
    # outermost right bin also holds rows at its outer edge c + reach.
    if left:
        j = np.ceil(a / w - _EPS).astype(int) - 1
    else:
        j = np.floor(a / w + _EPS).astype(int)
    j = np.clip(j, 0, J - 1)
    inside = a <= reach * (1 + _EPS)
    tot = lambda v: np.bincount(j[inside], weights=v[inside], minlength=J)  # noqa: E731
    return w, tot(n), tot(s1), tot(sx)


def _line(d, mask, w, degree, h, sign, scale):
    """Fitted local polynomial on one side with a pointwise 95% band."""
    beta, Ainv, R, fit = _side_fit(d.u[mask], d.n[mask], d.s1[mask], d.s2[mask], w[mask], degree)
    rss = _rss(d.n[mask], d.s1[mask], d.s2[mask], fit)
    meat = (R * (w[mask] ** 2 * rss)[:, None]).T @ R
    V = Ainv @ meat @ Ainv * scale
    # Drawn only as far as the data reach inside the window (a coarse variable may stop short).
    g = sign * np.linspace(0.0, min(h, float(np.abs(d.u[mask]).max())), LINE_POINTS)
    G = np.vander(g, degree + 1, increasing=True)
    y = G @ beta
    half = Z95 * np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", G, V, G), 0.0))
    return {"u": g.tolist(), "y": y.tolist(), "low": (y - half).tolist(), "high": (y + half).tolist()}


def uptake_plot(stats, row: dict, min_cell: int) -> dict:
    """Binned treatment shares on each side and the local fits with bands, safe to show.

    Returns a JSON-ready dict (empty when there is nothing to draw): ``bins`` (one dict per
    display bin: side, x_low, x_high, x (mean of the running variable), mean, n),
    ``bins_imse_left/right`` (the IMSE choice, rounded up), ``bins_left/right`` (bins drawn
    before merging), ``merged_bins``, ``hidden_sides``, and ``line_left/right`` (x, fit, 95%
    band) when the jump was estimated.
    """
    c, h = row["cutoff"], row.get("bandwidth")
    if h is None or not np.isfinite(h) or h <= 0:
        return {}
    d = side_data(stats, row["treatment"], c, row.get("right_closed", True))
    if not d.u.size:
        return {}
    binary = is_binary(d.s1, d.s2)
    out = {"bins": [], "merged_bins": 0, "hidden_sides": 0, "binary": binary}
    for side, mask in (("left", ~d.right), ("right", d.right)):
        a = np.abs(d.u[mask])
        if not a.size:
            out[f"bins_{side}"] = 0
            continue
        reach = float(min(2 * h, a.max())) or float(a.max())
        win = a <= reach * (1 + _EPS)
        raw = imse_bins(d.u[mask][win], d.n[mask][win], d.s1[mask][win], d.s2[mask][win], reach)
        distinct = int(win.sum())
        J = MAX_DISPLAY_BINS if not np.isfinite(raw) or raw > MAX_DISPLAY_BINS else math.ceil(raw)
        J = max(MIN_DISPLAY_BINS, min(J, distinct, MAX_DISPLAY_BINS)) if distinct else 0
        out[f"bins_imse_{side}"] = None if np.isnan(raw) else (math.ceil(raw) if np.isfinite(raw) else None)
        out[f"bins_{side}"] = J
        if not J:
            continue
        width, n, s1, sx = _side_bins(a, d.n[mask], d.s1[mask], d.u[mask] * d.n[mask], J, reach,
                                      side == "left")
        groups = merge_sparse(n, s1, binary, min_cell)
        if not groups and n.sum() > 0:
            out["hidden_sides"] += 1
        out["merged_bins"] += int(sum(len(g) - 1 for g in groups))
        for g in groups:
            ng, sg, xg = n[g].sum(), s1[g].sum(), sx[g].sum()
            lo, hi = min(g) * width, (max(g) + 1) * width
            x_low, x_high = (c - hi, c - lo) if side == "left" else (c + lo, c + hi)
            out["bins"].append({"side": side, "x_low": x_low, "x_high": x_high,
                                "x": c + xg / ng, "mean": sg / ng, "n": int(round(ng))})
    if np.isfinite(row.get("jump", np.nan)):
        out.update(_lines(d, row, h))
    return out


def _lines(d, row, h):
    kern, degree = row.get("kernel", "triangular"), int(row.get("degree", 1))
    w = kernel_fn(kern)(d.u / h)
    inside = w > 0
    L, Rm = inside & ~d.right, inside & d.right
    n_h = float(d.n[inside].sum())
    k = 2 * (degree + 1)
    scale = n_h / (n_h - k) if n_h > k else float("nan")
    out = {}
    try:
        for key, mask, sign in (("line_left", L, -1.0), ("line_right", Rm, 1.0)):
            ln = _line(d, mask, w, degree, h, sign, scale)
            ln["x"] = [row["cutoff"] + g for g in ln.pop("u")]
            out[key] = ln
    except np.linalg.LinAlgError:
        return {}
    return out


def _histogram(stats, cutoff, b, right_closed):
    """Counts in bins of width b aligned on the cutoff (as the McCrary test bins them)."""
    st = stats.pooled()
    keep = st.n > 0
    x, n = st.x[keep], st.n[keep].astype(float)
    u = (x - cutoff) / b
    j = (np.floor(u + 1e-7) if right_closed else np.ceil(u - 1e-7) - 1).astype(np.int64)
    lo, hi = j.min(), j.max()
    counts = np.bincount(j - lo, weights=n, minlength=hi - lo + 1)
    return np.arange(lo, hi + 1), counts, n.sum()


def _smooth(mid, height, at, h):
    """Local linear (triangular kernel) smoother of histogram heights evaluated at ``at``."""
    out = []
    for u0 in at:
        w = np.clip(1 - np.abs(mid - u0) / h, 0, None)
        m = w > 0
        if m.sum() < 2:
            out.append(float("nan"))
            continue
        R = np.column_stack([np.ones(m.sum()), mid[m] - u0])
        A = (R * w[m][:, None]).T @ R
        try:
            out.append(float(np.linalg.solve(A, R.T @ (w[m] * height[m]))[0]))
        except np.linalg.LinAlgError:
            out.append(float("nan"))
    return out


def density_plot(stats, row: dict, min_cell: int) -> dict:
    """Histogram of the running variable around the cutoff and the fitted one-sided densities.

    Heights are count / (N × bin width), so they estimate the density.  Fine bins of the
    McCrary (2008) test (width b, aligned on the cutoff) are merged outward until each holds 0
    or at least ``min_cell`` rows; the fitted curves are the test's local linear smoother
    (triangular kernel, its bandwidth) run on the unmerged heights of each side separately, so
    at the cutoff they equal the test's f̂₋ and f̂₊.
    """
    c, rc = row["cutoff"], row.get("right_closed", True)
    t = mccrary_test(stats, c, rc)
    if t.reason or not np.isfinite(t.bandwidth):
        return {}
    b, hd = t.bin_width, t.bandwidth
    idx, counts, N = _histogram(stats, c, b, rc)
    mid = (idx + 0.5) * b
    height = counts / (N * b)
    reach = max(hd, 10 * b)
    out = {"bins": [], "bin_width": b, "bandwidth": hd, "f_left": t.f_left, "f_right": t.f_right,
           "merged_bins": 0, "hidden_sides": 0}
    for side, sel, sign in (("left", idx < 0, -1), ("right", idx >= 0, 1)):
        order = np.argsort(np.abs(mid[sel]))            # from the cutoff outward
        k_side, n_side, m_side = idx[sel][order], counts[sel][order], mid[sel][order]
        win = np.abs(m_side) <= reach
        k_side, n_side = k_side[win], n_side[win]
        groups = merge_sparse(n_side, n_side, False, min_cell, keep_empty=True)
        if not groups and n_side.sum() > 0:
            out["hidden_sides"] += 1
        out["merged_bins"] += int(sum(len(g) - 1 for g in groups))
        for g in groups:
            lo, hi = float(k_side[g].min() * b), float((k_side[g].max() + 1) * b)
            cnt = float(n_side[g].sum())
            out["bins"].append({"side": side, "x_low": c + lo, "x_high": c + hi,
                                "n": int(round(cnt)), "height": cnt / (N * (hi - lo))})
        at = sign * np.linspace(0.0, reach, LINE_POINTS)
        fit = _smooth(mid[sel], height[sel], at, hd)
        out[f"curve_{side}"] = {"x": (c + at).tolist(), "y": fit}
    return out


def sensitivity_plot(stats, row: dict) -> list:
    """The jump and its 95% interval at multiples of the chosen bandwidth."""
    h = row.get("bandwidth")
    if h is None or not np.isfinite(h) or not np.isfinite(row.get("jump", np.nan)):
        return []
    d = side_data(stats, row["treatment"], row["cutoff"], row.get("right_closed", True))
    out = []
    for f in SENSITIVITY_FACTORS:
        fit = fit_jump(stats, row["treatment"], row["cutoff"], h * f, row.get("kernel", "triangular"),
                       int(row.get("degree", 1)), row.get("right_closed", True), data=d)
        if fit.reason:
            continue
        out.append({"factor": f, "bandwidth": h * f, "jump": fit.jump, "ci_low": fit.ci_low,
                    "ci_high": fit.ci_high})
    return out


def timeline_plot(stats, row: dict, min_cell: int) -> list:
    """The jump estimated in each calendar year (period keys are quarters), at the bandwidth.

    A year is left out when either side of the window holds fewer than ``min_cell`` rows.
    """
    h = row.get("bandwidth")
    if not stats.keyed or (stats.period < 0).all() or h is None or not np.isfinite(h):
        return []
    years = np.unique(stats.period[stats.period >= 0] // 4)
    out = []
    for y in years:
        sub = stats.restrict(period=np.arange(4 * y, 4 * y + 4)).collapse(period=True, half=True)
        fit = fit_jump(sub, row["treatment"], row["cutoff"], h, row.get("kernel", "triangular"),
                       int(row.get("degree", 1)), row.get("right_closed", True))
        if fit.reason or is_small(fit.n_left, min_cell) or is_small(fit.n_right, min_cell):
            continue
        out.append({"year": int(y), "jump": fit.jump, "ci_low": fit.ci_low, "ci_high": fit.ci_high})
    return out
