"""Data-driven bandwidths computed from bin sums.

``ik_bandwidth`` follows the three-step plug-in of Imbens & Kalyanaraman (2012, Review of
Economic Studies 79(3)); the constants are those listed in docs/methods.md: pilot 1.84·S_X·N^(-1/5)
(normal reference for a uniform kernel), 3.56 for the second-derivative pilot, regulariser
2160·σ²/(N₂h₂⁴), and C_K = 3.4375 for the triangular kernel (2.7019 uniform, 3.1999 Epanechnikov),
C_K = (V/B²)^(1/5) with the boundary local-linear constants V and B.
"""
from __future__ import annotations

from dataclasses import dataclass, asdict

import numpy as np

from ..bins import BinnedStats
from ..engines.plan import weighted_quantile
from .local import SideData, side_data

C_K = {"triangular": 3.4375, "uniform": 2.7019, "epanechnikov": 3.1999}


@dataclass(frozen=True)
class BandwidthChoice:
    """A bandwidth and the pieces it was computed from (NaN pieces when not applicable)."""

    h: float
    method: str
    h_pilot: float = float("nan")
    density: float = float("nan")
    sigma2: float = float("nan")
    m3: float = float("nan")
    h2_left: float = float("nan")
    h2_right: float = float("nan")
    m2_left: float = float("nan")
    m2_right: float = float("nan")
    reg_left: float = float("nan")
    reg_right: float = float("nan")
    note: str | None = None

    def to_dict(self) -> dict:
        return asdict(self)


def _ols(u, n, s1, degree):
    R = np.vander(u, degree + 1, increasing=True)
    A = (R * n[:, None]).T @ R
    return np.linalg.solve(A, R.T @ s1)


def ik_bandwidth(stats: BinnedStats, column: str, cutoff: float, kernel: str = "triangular",
                 right_closed: bool = True, data: SideData | None = None) -> BandwidthChoice:
    """Imbens–Kalyanaraman (2012) MSE-optimal bandwidth for a sharp local linear jump.

    Parameters
    ----------
    stats : BinnedStats of the running variable.
    column : the column whose jump is estimated (the treatment, for a first stage).
    cutoff : cutoff value (running-variable units).
    kernel : kernel of the final estimate (sets C_K).

    Returns
    -------
    BandwidthChoice with ``h`` in running-variable units; ``h`` is NaN when a step cannot be
    computed (e.g. one side holds fewer than three distinct values), with ``note`` saying why.

    Notes
    -----
    Imbens & Kalyanaraman (2012), Section 4.2 (journal version: pooled σ², cubic pilot on the
    observations between the two side medians, regularisation factor 3).
    """
    d = data if data is not None else side_data(stats, column, cutoff, right_closed)
    u, n, s1, s2, right = d.u, d.n, d.s1, d.s2, d.right
    N = n.sum()
    nan = float("nan")
    if N < 10 or right.sum() < 3 or (~right).sum() < 3:
        return BandwidthChoice(nan, "ik", note="fewer than three distinct values on a side")
    mean = (n * u).sum() / N
    var_x = ((n * (u - mean) ** 2).sum()) / (N - 1)
    # Step 1: pilot density and pooled conditional variance at the cutoff.
    h1 = 1.84 * np.sqrt(var_x) * N ** (-0.2)
    wl = (~right) & (u >= -h1)
    wr = right & (u <= h1)
    nl, nr = n[wl].sum(), n[wr].sum()
    if nl < 2 or nr < 2:
        return BandwidthChoice(nan, "ik", h1, note="too few rows near the cutoff for the pilot")
    f = (nl + nr) / (2 * N * h1)
    ss = (s2[wl].sum() - s1[wl].sum() ** 2 / nl) + (s2[wr].sum() - s1[wr].sum() ** 2 / nr)
    sigma2 = max(ss, 0.0) / (nl + nr)
    # Step 2: third derivative from a global cubic with an intercept shift, fitted between
    # the median of x on each side.
    med_l = weighted_quantile(u[~right], n[~right], 0.5)
    med_r = weighted_quantile(u[right], n[right], 0.5)
    mid = (u >= med_l) & (u <= med_r)
    if mid.sum() < 6 or right[mid].sum() < 2 or (~right[mid]).sum() < 2:
        mid = np.ones_like(right)
    R = np.column_stack([np.ones(mid.sum()), right[mid].astype(float), u[mid], u[mid] ** 2, u[mid] ** 3])
    A = (R * n[mid][:, None]).T @ R
    try:
        gamma = np.linalg.lstsq(A, R.T @ s1[mid], rcond=None)[0]
    except np.linalg.LinAlgError:
        gamma = np.zeros(5)
    m3 = 6 * gamma[4]
    n_r, n_l = n[right].sum(), n[~right].sum()
    span_r, span_l = u[right].max(), -u[~right].min()
    if m3 != 0 and sigma2 > 0:
        base = (sigma2 / (f * m3 ** 2)) ** (1 / 7)
        h2r, h2l = 3.56 * base * n_r ** (-1 / 7), 3.56 * base * n_l ** (-1 / 7)
    else:
        h2r, h2l = span_r, span_l
    h2r, h2l = min(h2r, span_r), min(h2l, span_l)
    m2, reg, note = [], [], None
    for side, h2 in ((right, h2r), (~right, h2l)):
        m = side & (np.abs(u) <= h2)
        if m.sum() < 3:
            # Widen to the three nearest support points so the quadratic is identified.
            far = np.sort(np.abs(u[side]))[min(2, side.sum() - 1)]
            m = side & (np.abs(u) <= far)
            h2 = far
            note = "second-derivative pilot widened to three support points"
        lam = _ols(u[m], n[m], s1[m], 2)
        n2 = n[m].sum()
        m2.append(2 * lam[2])
        reg.append(2160 * sigma2 / (n2 * h2 ** 4) if h2 > 0 else 0.0)
    m2r, m2l = m2
    rr, rl = reg
    denom = f * ((m2r - m2l) ** 2 + rr + rl)
    if not denom > 0:
        return BandwidthChoice(nan, "ik", h1, f, sigma2, m3, h2l, h2r, m2l, m2r, rl, rr,
                               "the outcome is constant near the cutoff")
    h = C_K[kernel] * (2 * sigma2 / denom) ** 0.2 * N ** (-0.2)
    return BandwidthChoice(float(h), "ik", float(h1), float(f), float(sigma2), float(m3),
                           float(h2l), float(h2r), float(m2l), float(m2r), float(rl), float(rr), note)


def ensure_support(h: float, data: SideData, degree: int, minimum: int | None = None) -> tuple[float, str | None]:
    """Widen ``h`` so each side has at least ``degree + 2`` distinct values with positive weight."""
    need = minimum or degree + 2
    out, note = h, None
    for side in (data.right, ~data.right):
        dist = np.sort(np.abs(data.u[side]))
        if dist.size == 0:
            continue
        k = min(need, dist.size) - 1
        required = dist[k] * 1.01 + 1e-12
        if not (out > required):
            out, note = required, f"bandwidth widened to reach {need} distinct values per side"
    return float(out), note
