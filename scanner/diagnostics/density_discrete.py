"""Count-based density tests: Frandsen (2017) for discrete support, and a binomial window test.

Frandsen (2017, Advances in Econometrics 38): with a discrete running variable take the support
point at the cutoff x₀ (the first point of the side that holds the cutoff value) and its two
neighbours x₋₁, x₊₁ with counts N₋₁, N₀, N₊₁ and M = N₋₁ + N₀ + N₊₁.  If the probability mass
function is locally linear, N₀ | M ~ Binomial(M, 1/3).  A smoothness bound k ≥ 0 widens the
admissible success probability to an interval and the p-value is the largest two-sided binomial
p-value over it.  Our parameterisation (Frandsen's own differs; from memory): the second
difference is bounded relative to the local mass, |p₋₁ − 2p₀ + p₊₁| ≤ k (p₋₁ + p₀ + p₊₁), which
gives π = p₀/(p₋₁ + p₀ + p₊₁) ∈ [(1 − k)/3, (1 + k)/3].  Default k = 0.1 (covers, e.g., a
discretised normal with a standard deviation of two support points or more; common practice is to
report a sensitivity over k).

Binomial window (the local-randomisation view of Cattaneo, Frandsen & Titiunik 2015, J. Causal
Inference 3(1)): inside a small symmetric window around the cutoff, units on either side are as
good as randomly placed, so the count on the right is Binomial(n_window, 1/2) when the window
holds the same length (exact support: the same number of support points) on each side.
"""
from __future__ import annotations

import numpy as np
from scipy import stats as sps

from ..bins import BinnedStats
from .density import DensityTest

FRANDSEN_K = 0.1
WINDOW_POINTS = 3            # support points per side in the binomial window (exact support)


def _nan_test(method, reason, h=float("nan")):
    nan = float("nan")
    return DensityTest(method, nan, nan, nan, nan, nan, nan, h, reason)


def _binom_two_sided(k, m, pi):
    """Two-sided binomial p-value: twice the smaller tail, capped at 1."""
    lo = sps.binom.cdf(k, m, pi)
    hi = sps.binom.sf(k - 1, m, pi)
    return float(min(1.0, 2 * min(lo, hi)))


def frandsen_test(stats: BinnedStats, cutoff: float, right_closed: bool = True,
                  k: float = FRANDSEN_K, drop=None) -> DensityTest:
    """Frandsen (2017) manipulation test for a discrete running variable.

    Parameters
    ----------
    stats : BinnedStats (exact support) of the running variable.
    cutoff : cutoff value; the support point holding it is tested against its two neighbours.
    k : smoothness bound (module docstring); 0 is exact local linearity.
    drop : optional boolean mask of bins to leave out (heaped values).

    Returns
    -------
    DensityTest: ``theta`` is ln(N₀ / (M/3)), the p-value is the largest over the admissible π.

    Notes
    -----
    Frandsen (2017); the k = 0 case N₀ | M ~ Bin(M, 1/3) is derived in docs/methods.md
    ("Discrete support").
    """
    x, n = stats.support_counts(drop)
    if x.size < 3:
        return _nan_test("frandsen", "fewer than 3 support points")
    right = x >= cutoff if right_closed else x > cutoff
    if right.all() or not right.any():
        return _nan_test("frandsen", "no support point on one side of the cutoff")
    i0 = int(np.argmax(right)) if right_closed else int(np.argmax(right)) - 1
    # right_closed: x₀ is the first point at or above c; otherwise the last point at or below c.
    if i0 < 1 or i0 > x.size - 2:
        return _nan_test("frandsen", "the cutoff's support point lacks a neighbour")
    nm, n0, np1 = n[i0 - 1], n[i0], n[i0 + 1]
    m = int(nm + n0 + np1)
    lo, hi = max(1e-9, (1 - k) / 3), min(1 - 1e-9, (1 + k) / 3)
    share = n0 / m
    pi = min(max(share, lo), hi)       # the admissible π closest to the observed share
    p = _binom_two_sided(int(n0), m, pi)
    theta = float(np.log(n0 / (m / 3))) if n0 > 0 else float("-inf")
    se = float(np.sqrt((1 - 1 / 3) / (m / 3))) if m > 0 else float("nan")
    return DensityTest("frandsen", theta, se, p, float(nm), float(np1), float("nan"),
                       float(x[i0 + 1] - x[i0 - 1]) / 2)


def window_count_test(stats: BinnedStats, cutoff: float, right_closed: bool = True,
                      half_width: float | None = None, points: int = WINDOW_POINTS,
                      drop=None) -> DensityTest:
    """Binomial test of the counts in a small symmetric window (local randomisation view).

    Parameters
    ----------
    half_width : window half-width (running-variable units).  Default: the ``points`` nearest
        support points on each side (exact support) or ``points`` bins on each side.

    Returns
    -------
    DensityTest with θ = ln(n₊/n₋), the exact two-sided Binomial(n, 1/2) p-value; ``bandwidth``
    is the window half-width used.

    Notes
    -----
    Cattaneo, Frandsen & Titiunik (2015), J. Causal Inference 3(1): randomisation inference in a
    window around the cutoff.
    """
    x, n = stats.support_counts(drop)
    right = x >= cutoff if right_closed else x > cutoff
    if right.all() or not right.any():
        return _nan_test("binomial window", "no data on one side of the cutoff")
    if half_width is None:
        dl = np.sort(cutoff - x[~right])
        dr = np.sort(x[right] - cutoff)
        kk = min(points, dl.size, dr.size)
        # Equal numbers of support points (or bins) on each side; the half-width is the farther
        # of the two k-th distances, and the count uses exactly k points per side.
        nl = n[~right][np.argsort(cutoff - x[~right])][:kk].sum()
        nr = n[right][np.argsort(x[right] - cutoff)][:kk].sum()
        half = float(max(dl[kk - 1], dr[kk - 1]))
    else:
        half = float(half_width)
        nl = n[~right & (x > cutoff - half)].sum()
        nr = n[right & (x < cutoff + half)].sum()
    m = int(nl + nr)
    if nl == 0 or nr == 0:
        return _nan_test("binomial window", "an empty side in the window", half)
    p = _binom_two_sided(int(nr), m, 0.5)
    theta = float(np.log(nr / nl))
    se = float(np.sqrt(1 / nr + 1 / nl))
    return DensityTest("binomial window", theta, se, p, float(nl), float(nr), float("nan"), half)
