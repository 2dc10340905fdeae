"""Density (sorting) test at a cutoff from bin counts.

McCrary (2008, Journal of Econometrics 142(2)): a fine histogram with bins that never straddle
the cutoff, bin width b = 2·σ̂_X·N^(-1/2), normalised heights count/(N·b), a triangular-kernel
local linear smoother of the heights on each side evaluated at the cutoff, bandwidth from the
paper's rule of thumb h = 3.348·[σ̃²·range / Σ f̃''(X_j)²]^(1/5) per side (averaged), and
θ = ln f̂₊ − ln f̂₋ with se = √((1/(N h))·(24/5)·(1/f̂₊ + 1/f̂₋)).  24/5 is the boundary
local-linear triangular variance constant (docs/methods.md).

The histogram is built from our bins' representative x, so the width is never below the bin
grid or the spacing of an exact support near the cutoff.
"""
from __future__ import annotations

from dataclasses import dataclass, asdict

import numpy as np

from ..bins import BinnedStats
from ..estimate.local import two_sided_p

MIN_BINS = 5


@dataclass(frozen=True)
class DensityTest:
    """Result of a density test; NaN with a ``reason`` when it cannot be computed."""

    method: str
    theta: float
    se: float
    p_value: float
    f_left: float
    f_right: float
    bin_width: float
    bandwidth: float
    reason: str | None = None

    @property
    def ratio(self) -> float:
        return float(np.exp(self.theta)) if np.isfinite(self.theta) else float("nan")

    def to_dict(self) -> dict:
        return asdict(self)


def _fail(reason, b=float("nan"), h=float("nan")) -> DensityTest:
    nan = float("nan")
    return DensityTest("mccrary", nan, nan, nan, nan, nan, b, h, reason)


def _ll_at_zero(xc, y, h):
    w = np.clip(1 - np.abs(xc) / h, 0, None)
    m = w > 0
    if m.sum() < 2:
        return float("nan")
    R = np.column_stack([np.ones(m.sum()), xc[m]])
    A = (R * w[m][:, None]).T @ R
    try:
        return float(np.linalg.solve(A, R.T @ (w[m] * y[m]))[0])
    except np.linalg.LinAlgError:
        return float("nan")


def mccrary_test(stats: BinnedStats, cutoff: float, right_closed: bool = True,
                 bin_width: float | None = None, bandwidth: float | None = None) -> DensityTest:
    """McCrary (2008) test of a jump in the density of the running variable at ``cutoff``.

    Parameters
    ----------
    stats : BinnedStats of the running variable (counts ``n`` and Σx, Σx² are used).
    cutoff : cutoff value; bins are aligned on it.
    bin_width, bandwidth : override the paper's defaults (running-variable units).

    Returns
    -------
    DensityTest with θ = log density ratio (right/left), its SE and a two-sided p-value.
    """
    st = stats.pooled()
    keep = st.n > 0
    x, n = st.x[keep], st.n[keep].astype(float)
    N = n.sum()
    if N < 20:
        return _fail("fewer than 20 rows")
    mean = (n * x).sum() / N
    sd = np.sqrt(max(st.sxx[keep].sum() / N - mean ** 2, 0.0))
    if sd == 0:
        return _fail("the running variable is constant")
    spacing = np.diff(np.unique(x))
    floor_w = st.width if st.kind == "width" else (spacing.min() if spacing.size else 0)
    b = bin_width or max(2 * sd * N ** -0.5, floor_w)
    u = (x - cutoff) / b
    # A small tolerance keeps support points that sit on a bin edge (up to rounding) in one bin.
    j = (np.floor(u + 1e-7) if right_closed else np.ceil(u - 1e-7) - 1).astype(np.int64)
    lo, hi = j.min(), j.max()
    if lo >= 0 or hi < 0:
        return _fail("no data on one side of the cutoff", b)
    counts = np.bincount(j - lo, weights=n, minlength=hi - lo + 1)
    idx = np.arange(lo, hi + 1)
    mid = (idx + 0.5) * b               # centred midpoints X_j − c
    height = counts / (N * b)
    left, right = idx < 0, idx >= 0
    if (counts[left] > 0).sum() < MIN_BINS or (counts[right] > 0).sum() < MIN_BINS:
        # With a handful of support points a continuous density test has nothing to smooth;
        # tests built for discrete support apply instead.
        return _fail(f"fewer than {MIN_BINS} occupied histogram bins on a side", b)
    h = bandwidth
    if h is None:
        hs = []
        for side in (left, right):
            xs, ys = mid[side], height[side]
            deg = min(4, side.sum() - 1)
            coef = np.polynomial.polynomial.polyfit(xs, ys, deg)
            resid = ys - np.polynomial.polynomial.polyval(xs, coef)
            s2 = np.mean(resid ** 2)
            d2 = np.polynomial.polynomial.polyval(xs, np.polynomial.polynomial.polyder(coef, 2)) if deg >= 2 else np.zeros_like(xs)
            denom = np.sum(d2 ** 2)
            rng = xs.max() - xs.min() + b
            hs.append(3.348 * (s2 * rng / denom) ** 0.2 if denom > 0 and s2 > 0 else rng)
        h = float(np.mean(hs))
    h = max(h, 2.5 * b)   # at least two bins with positive weight on each side
    fl = _ll_at_zero(mid[left], height[left], h)
    fr = _ll_at_zero(mid[right], height[right], h)
    if not (fl > 0 and fr > 0):
        return _fail("estimated density is not positive on both sides", b, h)
    theta = np.log(fr) - np.log(fl)
    se = np.sqrt((1 / (N * h)) * 4.8 * (1 / fr + 1 / fl))
    p = two_sided_p(theta / se)
    return DensityTest("mccrary", float(theta), float(se), p, fl, fr, float(b), float(h))
