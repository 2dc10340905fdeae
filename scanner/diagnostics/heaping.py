"""Heaping at values of a discrete running variable.

Heaps — excess mass at round or conventional values — bias RD estimates when heaped units differ
from the rest (Barreca, Lindo & Waddell 2016, Economic Inquiry 54(1)).  The check compares the
count at a support value with its two nearest support values on each side: if the probability
mass function is locally smooth, the value's share of the five counts is about 1/5, so a
one-sided binomial tail gives the p-value (a five-point version of the local-linearity argument
in Frandsen 2017).
"""
from __future__ import annotations

from dataclasses import dataclass

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

    @property
    def is_heap(self) -> bool:
        return self.p_value < HEAP_P and self.ratio >= HEAP_RATIO


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
    return [HeapTest(float(a), int(b), float(c), float(d), float(e))
            for a, b, c, d, e in zip(v, n, mean, ratio, p)]


def heap_near(tests: list[HeapTest], cutoff: float, reach: float) -> HeapTest | None:
    """The strongest heap within ``reach`` of the cutoff, or the test at the cutoff if none."""
    near = [t for t in tests if abs(t.value - cutoff) <= reach]
    heaps = [t for t in near if t.is_heap]
    if heaps:
        return max(heaps, key=lambda t: (t.ratio, -abs(t.value - cutoff)))
    at = [t for t in near if np.isclose(t.value, cutoff)]
    return at[0] if at else None
