"""Heaping at round values of a discrete running variable, and the donut re-estimate.

Heaps — excess mass at round or conventional values — bias RD estimates when heaped units differ
from the rest (Barreca, Lindo & Waddell 2016, Economic Inquiry 54(1)).  The check compares the
count at a support value with its two nearest support values on each side: if the probability
mass function is locally smooth, the value's share of the five counts is about 1/5, so a
one-sided binomial tail gives the p-value (a five-point version of the local-linearity argument
in Frandsen 2017).

A heap is a *round* value (a multiple of 5 × the variable's resolution: 5, 10, 25, ... for
integers, .0 and .5 for one decimal, and so on) with p < ``HEAP_P`` and at least ``HEAP_RATIO``
times its neighbours' mean count; the two ends of the support are excluded (a point mass there is
top or bottom coding, not rounding).  Only exact-support bins are checked: a rounded variable has
few distinct values and is binned exactly; fixed-width bins cannot show a heap narrower than a bin.

Donut (Barreca, Lindo & Waddell 2016): the jump is re-estimated without the rows at heaped values
inside the window; the design "changes its answer" when the donut's jump leaves the full
estimate's 95% interval or the donut's own test no longer finds a jump at the scan's level.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy import stats as sps

from ..bins import BinnedStats

HEAP_P = 0.001      # common practice: a heap needs strong evidence ...
HEAP_RATIO = 1.5    # ... and at least 1.5 times the mass of its neighbours


@dataclass(frozen=True)
class HeapTest:
    value: float
    count: int
    neighbour_mean: float
    ratio: float
    p_value: float

    round_value: bool = True

    @property
    def is_heap(self) -> bool:
        return self.round_value and self.p_value < HEAP_P and self.ratio >= HEAP_RATIO


def resolution(values: np.ndarray) -> float:
    """Recording resolution of a support: the most common gap, snapped to 1, 2 or 5 × 10^k."""
    gaps = np.diff(np.unique(values))
    gaps = gaps[gaps > 0]
    if gaps.size == 0:
        return 1.0
    g = float(np.median(gaps))
    e = np.floor(np.log10(g))
    for m in (1, 2, 5, 10):
        if g <= m * 10 ** e * (1 + 1e-6):
            return float(m * 10 ** e)
    return g


def is_round(value: float, res: float) -> bool:
    """True for a multiple of 5 × resolution (5, 10, 25, ... ; .0/.5 for one decimal)."""
    q = value / (5 * res)
    return bool(abs(q - round(q)) < 1e-6)


def heap_tests(stats: BinnedStats) -> list[HeapTest]:
    """A heap test at every support value of an exact-support running variable."""
    if stats.kind != "exact":
        return []
    st = stats.pooled()
    keep = st.n > 0
    v, n = st.key[keep], st.n[keep].astype(float)
    if v.size < 5:
        return []
    pad = np.concatenate([[np.nan, np.nan], n, [np.nan, np.nan]])
    nb = np.vstack([pad[0:-4], pad[1:-3], pad[3:-1], pad[4:]])
    k = np.isfinite(nb).sum(axis=0)
    tot = np.nansum(nb, axis=0)
    mean = np.where(k > 0, tot / np.maximum(k, 1), np.nan)
    share = 1.0 / (k + 1)
    p = sps.binom.sf(n - 1, n + tot, share)
    ratio = np.where(mean > 0, n / np.where(mean > 0, mean, 1), np.inf)
    res = resolution(v)
    # The two ends of the support are never heaps: a point mass there is top or bottom coding
    # (censoring), not rounding.
    lo, hi = v.min(), v.max()
    return [HeapTest(float(a), int(b), float(c), float(d), float(e),
                     is_round(a, res) and lo < a < hi)
            for a, b, c, d, e in zip(v, n, mean, ratio, p)]


def heap_values(tests: list[HeapTest]) -> np.ndarray:
    """The support values that are heaps."""
    return np.array([t.value for t in tests if t.is_heap], float)


def deheaped(stats: BinnedStats, tests: list[HeapTest]) -> BinnedStats:
    """Pooled bins with each heap's count cut to its neighbours' mean (the excess removed).

    Used to run density tests "without heaps": dropping heaped values outright would leave
    regular holes in the support that a smoothing density test reads as dips, so only the
    excess mass is removed and the support stays regular.  Σx and Σx² are scaled alike.
    """
    st = stats.pooled()
    heaps = {t.value: t.neighbour_mean for t in tests if t.is_heap}
    if not heaps or st.kind != "exact":
        return st
    n = st.n.astype(float).copy()
    for i, v in enumerate(st.key):
        if v in heaps and n[i] > 0:
            n[i] = max(1.0, np.rint(heaps[v]))
    ratio = np.where(st.n > 0, n / np.maximum(st.n, 1), 0.0)
    return replace(st, n=n.astype(np.int64), sx=st.sx * ratio, sxx=st.sxx * ratio,
                   cnt=np.minimum(st.cnt, n.astype(np.int64)[:, None]))


def donut_fit(stats: BinnedStats, column: str, cutoff: float, bandwidth: float, values,
              kernel: str = "triangular", degree: int = 1, right_closed: bool = True):
    """The jump re-estimated without rows at the heaped ``values`` (Barreca et al. 2016)."""
    from ..estimate.local import SideData, fit_jump, side_data
    d = side_data(stats, column, cutoff, right_closed)
    keep = ~np.isin(np.round(d.u + cutoff, 12), np.round(np.asarray(values, float), 12))
    dd = SideData(d.u[keep], d.n[keep], d.s1[keep], d.s2[keep], d.right[keep])
    return fit_jump(stats, column, cutoff, bandwidth, kernel, degree, right_closed, data=dd)


def donut_changes(full, donut, alpha: float) -> bool:
    """True when the donut jump leaves the full 95% interval or loses significance at ``alpha``."""
    if not (np.isfinite(full.jump) and np.isfinite(donut.jump)):
        return False
    outside = not (full.ci_low <= donut.jump <= full.ci_high)
    lost = full.p_value < alpha <= donut.p_value
    return bool(outside or lost)


def heap_near(tests: list[HeapTest], cutoff: float, reach: float) -> HeapTest | None:
    """The strongest heap within ``reach`` of the cutoff, or the test at the cutoff if none."""
    near = [t for t in tests if abs(t.value - cutoff) <= reach]
    heaps = [t for t in near if t.is_heap]
    if heaps:
        return max(heaps, key=lambda t: (t.ratio, -abs(t.value - cutoff)))
    at = [t for t in near if np.isclose(t.value, cutoff)]
    return at[0] if at else None
