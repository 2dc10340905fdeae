"""Heaping at a value of a discrete running variable.

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


@dataclass(frozen=True)
class HeapTest:
    value: float
    count: int
    neighbour_mean: float
    ratio: float
    p_value: float


def heap_at(stats: BinnedStats, value: float, tol: float | None = None) -> HeapTest | None:
    """Test for a heap at the support point nearest ``value`` (exact-support bins only)."""
    if stats.kind != "exact":
        return None
    st = stats.collapse() if ((stats.period >= 0).any() or (stats.half >= 0).any()) else stats
    keep = st.n > 0
    v, n = st.key[keep], st.n[keep]
    if v.size < 5:
        return None
    i = int(np.argmin(np.abs(v - value)))
    spacing = np.median(np.diff(v))
    if abs(v[i] - value) > (tol if tol is not None else spacing / 2 + 1e-12):
        return None
    lo, hi = max(0, i - 2), min(v.size, i + 3)
    nb = np.concatenate([n[lo:i], n[i + 1:hi]])
    if nb.size < 2:
        return None
    m = int(n[i] + nb.sum())
    share = 1.0 / (nb.size + 1)
    p = float(sps.binom.sf(n[i] - 1, m, share))
    mean = float(nb.mean())
    return HeapTest(float(v[i]), int(n[i]), mean, float(n[i] / mean) if mean > 0 else float("inf"), p)
