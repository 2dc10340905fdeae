"""Where does uptake actually jump?  The one-break local model behind every location cutscan reports.

A break's location is the split of the rows that best fits a one-break model inside a window:
separate least-squares lines on each side of the split, and the split chosen to minimise the
residual sum of squares S(γ) of that one fit (Hansen 2000, *Econometrica* 68(3); the same
criterion as the largest squared local jump of Porter & Yu 2015, *J. Econometrics* 189, in its
least-squares form).  Why not the largest |t|: where uptake is constant on one side (everyone
treated, or no one) that side adds no variance, so a window straddling the real break divides
a biased jump by a tiny SE and |t| peaks in the wrong place, often with the wrong sign.  The
size of the fit's improvement does not have that flaw.

Location set: the splits whose likelihood-ratio statistic from the same fit,
LR(γ) = (S(γ) − S(γ̂)) / σ̂², σ̂² = S(γ̂) / (N − 4), stays below c_α = −2 ln(1 − √(1 − α))
(7.35 at α = 0.05), and whose jump has the sign of the jump at γ̂ (a sign change is another
break).  The reported set is the hull of those splits.  On an exact support a split lies
between two recorded values, so the set is reported as the half-open gap, e.g. (13.5, 14.5]:
every cutoff in it divides the rows the same way.  On fixed-width bins splits are the engines'
exact-decimal bin edges.

The jump at γ̂ and its t use a variance that cannot collapse when one side is constant: the
larger of the HC1 sandwich (White 1980; MacKinnon & White 1985) and the variance pooled across
sides, σ̂²·Σℓ², the homoskedastic least-squares variance of the same fit (the variance Hansen's
LR statistic assumes).  Both are valid estimates of the jump's variance; the pooled one is zero
only when uptake is constant on both sides (a sharp rule).

:func:`locate` is the estimator ``cutscan check`` reports near a declared value; the discovery
search (scanner/discover.py) uses :func:`profile_break` on the window around its peak.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

from .bins import BinnedStats

METHOD = "least-squares one-break local linear fit, location set by LR inversion (Hansen 2000)"


def lr_critical(alpha: float) -> float:
    """Critical value of the LR statistic for an unknown threshold: −2 ln(1 − √(1 − α)).

    Notes
    -----
    Hansen (2000, Econometrica 68(3)), from memory; 7.35 at α = 0.05 (derived from the formula).
    """
    return float(-2.0 * math.log(1.0 - math.sqrt(1.0 - alpha)))


@dataclass(frozen=True)
class Break:
    """The best split of a window and its location set (running-variable units).

    ``location`` is the cutoff that reproduces the split (the first value on the right for a
    right-closed split on an exact support, the bin edge on fixed-width bins); ``split_low`` and
    ``split_high`` are the recorded values on either side of it.  ``ci_low_open`` is True when
    the set is the half-open (ci_low, ci_high].
    """

    location: float
    ci_low: float
    ci_high: float
    ci_low_open: bool
    split_low: float
    split_high: float
    jump: float
    se: float
    t: float
    lr_critical: float
    window_low: float
    window_high: float
    n_window: int
    n_splits: int
    reason: str | None = None

    def to_dict(self) -> dict:
        return asdict(self)


def _nan_break(reason, lo=float("nan"), hi=float("nan")) -> Break:
    nan = float("nan")
    return Break(nan, nan, nan, False, nan, nan, nan, nan, nan, nan, lo, hi, 0, 0, reason)


def _sorted_bins(stats: BinnedStats, column: str):
    st = stats.pooled()
    x, n, s1, s2 = st.column_sums(column)
    keep = n > 0
    order = np.argsort(x[keep], kind="stable")
    return st, x[keep][order], n[keep][order], s1[keep][order], s2[keep][order], \
        st.key[keep][order]


def split_values(st: BinnedStats, x, key, k, right_closed: bool = True) -> np.ndarray:
    """Cutoffs that split sorted bins ``[..k-1] | [k..]`` (``k`` an array of split indices).

    Exact support: the first value on the right (right-closed) or the last on the left; fixed
    width: the exact-decimal left edge of bin k.
    """
    k = np.asarray(k, np.int64)
    if st.kind == "exact":
        return np.asarray(x[k] if right_closed else x[k - 1], float)
    from .discover import bin_edges
    return bin_edges(st, key[k])


def _side_fits(N, A, B, T0, T1):
    """Intercept and slope of a least-squares line from its sums (u centred), NaN if singular."""
    det = N * B - A * A
    ok = det > 1e-12 * np.maximum(N, 1.0) * np.maximum(B, 1e-300)
    with np.errstate(invalid="ignore", divide="ignore"):
        a = np.where(ok, (B * T0 - A * T1) / det, np.nan)
        b = np.where(ok, (N * T1 - A * T0) / det, np.nan)
    return a, b, det, ok


def profile_break(stats: BinnedStats, column: str, lo: float, hi: float, window_low: float,
                  window_high: float, alpha: float = 0.05, right_closed: bool = True,
                  min_rows: int = 1, walls=()) -> Break:
    """Least-squares one-break fit of ``column`` on the bins in a window, over splits in [lo, hi].

    Parameters
    ----------
    stats : BinnedStats of the running variable (period/half keys are pooled).
    column : tracked column (a 0/1 treatment).
    lo, hi : the splits considered have their cutoff in [lo, hi].
    window_low, window_high : the rows fitted (bins with x in the window, clipped at ``walls``).
    walls : cutoffs of breaks already found; the window never reaches across one.
    min_rows : rows needed on each side of a split inside the window.

    Returns
    -------
    Break; NaN with a reason when no split has two distinct values on each side.

    Notes
    -----
    S(γ) = RSS of separate lines left and right of γ (Hansen 2000); location γ̂ = argmin S; set
    {γ : (S(γ) − S(γ̂))/σ̂² ≤ c_α, same sign of jump}; jump variance max(HC1, pooled) (see the
    module docstring).
    """
    st, x, n, s1, s2, key = _sorted_bins(stats, column)
    # A wall w (a break already found, right-closed) sends x ≥ w to its right.
    left_walls = [w for w in walls if w <= lo]
    right_walls = [w for w in walls if w > hi]
    if left_walls:
        window_low = max(window_low, max(left_walls))
    inwin = x >= window_low
    if right_walls and min(right_walls) <= window_high:
        window_high = min(right_walls)
        inwin &= x < window_high
    else:
        inwin &= x <= window_high
    idx = np.flatnonzero(inwin)
    if idx.size < 4:
        return _nan_break("fewer than four distinct values in the window", window_low, window_high)
    xs, ns, y1, y2, ks = x[idx], n[idx], s1[idx], s2[idx], key[idx]
    centre = 0.5 * (xs[0] + xs[-1])
    u = xs - centre
    cols = np.vstack([ns, ns * u, ns * u * u, y1, y1 * u, y2])
    pre = np.concatenate([np.zeros((6, 1)), np.cumsum(cols, axis=1)], axis=1)
    tot = pre[:, -1:]
    # split k: bins [0, k) left, [k, m) right, k = 2..m-2 (two distinct values per side)
    m = xs.size
    k = np.arange(2, m - 1)
    cut = split_values(st, xs, ks, k, right_closed)
    L, R = pre[:, k], tot - pre[:, k]
    nl, nr = L[0], R[0]
    use = (cut >= lo) & (cut <= hi) & (nl >= min_rows) & (nr >= min_rows)
    for w in walls:
        use &= cut != w
    if not use.any():
        return _nan_break("no split in range with enough rows on each side", window_low,
                          window_high)
    fits = []
    rss = np.zeros(k.size)
    for side in (L, R):
        a, b, det, ok = _side_fits(*side[:5])
        with np.errstate(invalid="ignore", divide="ignore"):
            r = side[5] - (side[2] * side[3] ** 2 - 2 * side[1] * side[3] * side[4]
                           + side[0] * side[4] ** 2) / det
        rss += np.where(ok, np.maximum(r, 0.0), np.nan)
        fits.append((a, b))
    uc = cut - centre
    jump = (fits[1][0] + fits[1][1] * uc) - (fits[0][0] + fits[0][1] * uc)
    use &= np.isfinite(rss)
    if not use.any():
        return _nan_break("no split with a line on each side", window_low, window_high)
    S = np.where(use, rss, np.inf)
    i = int(np.argmin(S))
    N = float(tot[0, 0])
    sigma2 = S[i] / max(N - 4.0, 1.0)
    c = lr_critical(alpha)
    if sigma2 > 0:
        lr = (S - S[i]) / sigma2
    else:       # a perfect fit (uptake constant on each side): only equally perfect splits
        lr = np.where(S <= S[i], 0.0, np.inf)
    inside = use & (lr <= c) & (np.sign(jump) == np.sign(jump[i]))
    a, b = int(np.flatnonzero(inside).min()), int(np.flatnonzero(inside).max())
    j_lo, j_hi = int(k[a]), int(k[b])
    if st.kind == "exact" and right_closed:       # every cutoff in (x_before, x_last] splits alike
        ci = (float(xs[j_lo - 1]), float(xs[j_hi]), True)
    elif st.kind == "exact":                      # x ≤ cutoff goes left: cutoffs are left values
        ci = (float(xs[j_lo - 1]), float(xs[j_hi - 1]), False)
    else:
        ci = (float(cut[a]), float(cut[b]), False)
    se = _jump_se(xs, ns, y1, y2, int(k[i]), float(cut[i]), sigma2)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = jump[i] / se if se > 0 else (math.copysign(math.inf, jump[i])
                                         if abs(jump[i]) > 1e-12 else float("nan"))
    j = int(k[i])
    return Break(float(cut[i]), ci[0], ci[1], ci[2], float(xs[j - 1]), float(xs[j]),
                 float(jump[i]), float(se), float(t), c, float(window_low), float(window_high),
                 int(N), int(use.sum()))


def _jump_se(xs, ns, y1, y2, j, cutoff, sigma2) -> float:
    """SE of the jump at a split: sqrt(max(HC1 sandwich, pooled σ̂²·Σℓ²)) (module docstring)."""
    var_hc, sum_l2, N = 0.0, 0.0, ns.sum()
    for side in (slice(0, j), slice(j, None)):
        u, nb, s1, s2 = xs[side] - cutoff, ns[side], y1[side], y2[side]
        S0, S1, S2 = nb.sum(), (nb * u).sum(), (nb * u * u).sum()
        det = S0 * S2 - S1 * S1
        if not det > 0:
            return float("nan")
        ell = (S2 - S1 * u) / det                     # intercept weight of each row in bin b
        a = (S2 * s1.sum() - S1 * (s1 * u).sum()) / det
        bb = (S0 * (s1 * u).sum() - S1 * s1.sum()) / det
        fit = a + bb * u
        mean = s1 / nb
        resid2 = np.maximum(s2 - s1 * mean, 0.0) + nb * (mean - fit) ** 2
        var_hc += float((ell * ell * resid2).sum())
        sum_l2 += float((nb * ell * ell).sum())
    hc1 = var_hc * N / max(N - 4.0, 1.0)
    return float(math.sqrt(max(hc1, sigma2 * sum_l2)))


@dataclass(frozen=True)
class Location:
    """Where uptake jumps near the declared value(s), by :func:`profile_break`."""

    cutoff: float
    jump: float
    se: float
    t: float
    declared: tuple[float, ...]
    nearest_declared: float
    grid_low: float
    grid_high: float
    grid_points: int
    reason: str | None = None
    ci_low: float = float("nan")
    ci_high: float = float("nan")
    ci_low_open: bool = False
    method: str = METHOD

    def to_dict(self) -> dict:
        d = asdict(self)
        d["declared"] = list(self.declared)
        return d


def locate(stats: BinnedStats, column: str, declared, bandwidth: float, reach: float | None = None,
           kernel: str = "triangular", degree: int = 1, right_closed: bool = True,
           alpha: float = 0.05) -> Location:
    """Location of the jump in ``column`` near the declared cutoff(s).

    Parameters
    ----------
    stats : BinnedStats of the running variable (period keys are pooled).
    column : tracked 0/1 treatment column.
    declared : one cutoff or several (old and new values of a changed rule).
    bandwidth : h; the rows fitted are those within h of the splits considered.
    reach : splits are considered in [min(declared) − reach, max(declared) + reach]; default h/2.
    kernel, degree : accepted for the caller's symmetry; the one-break fit is an unweighted
        local linear fit (Hansen 2000's least squares).

    Returns
    -------
    Location (cutoff, jump with a non-collapsing SE, location set); NaN with a reason when no
    split can be fitted.

    Notes
    -----
    See the module docstring: argmin of the one-fit residual sum of squares (Hansen 2000), which
    for a fixed window is the largest squared jump in least-squares form (Porter & Yu 2015).
    """
    dec = tuple(float(v) for v in np.atleast_1d(declared))
    r = bandwidth / 2 if reach is None else float(reach)
    lo, hi = min(dec) - r, max(dec) + r
    st = stats.pooled()
    br = profile_break(st, column, lo, hi, lo - bandwidth, hi + bandwidth, alpha, right_closed)
    nan = float("nan")
    if not np.isfinite(br.location):
        return Location(nan, nan, nan, nan, dec, nan, lo, hi, 0, br.reason)
    near = min(dec, key=lambda v: abs(v - br.location))
    return Location(br.location, br.jump, br.se, br.t, dec, near, lo, hi, br.n_splits, None,
                    br.ci_low, br.ci_high, br.ci_low_open)
