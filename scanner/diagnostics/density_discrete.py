"""Count-based density tests: Frandsen (2017) for discrete support, and a binomial window test.

Frandsen (2017, Advances in Econometrics 38): with a discrete running variable take the support
point at the cutoff x₀ (the first point of the side that holds the cutoff value) and its two
neighbours x₋₁, x₊₁ with counts N₋₁, N₀, N₊₁ and M = N₋₁ + N₀ + N₊₁.  If the probability mass
function is locally linear, N₀ | M ~ Binomial(M, 1/3).  A smoothness bound k ≥ 0 widens the
admissible success probability to an interval and the p-value is the largest two-sided binomial
p-value over it.  Our parameterisation (Frandsen's own differs; from memory): the second
difference is bounded relative to the local mass, |p₋₁ − 2p₀ + p₊₁| ≤ k (p₋₁ + p₀ + p₊₁), which
gives π = p₀/(p₋₁ + p₀ + p₊₁) ∈ [(1 − k)/3, (1 + k)/3].

Choice of k.  Frandsen leaves k to the user and recommends reading the test over a range of k
(from memory).  A fixed k = 0.1 made the test blind to less than 15.8% extra mass at the cutoff
point at any sample size, and its size was 0.000 on smooth designs.  By default k now comes from
the data's own curvature next to the cutoff (:func:`curvature_k`): a quadratic in the support
index through the counts at x₋₂, x₋₁, x₊₁, x₊₂ (x₀ left out, so extra mass there cannot inflate
k) gives the relative second difference at x₀, and k is its one-sided 99.9% upper bound (Poisson
variances of the counts).  The quadratic averages the curvature over five points, which is less
than the curvature at a mode: with a 95% bound the size next to the mode of a Binomial(19, 0.4)
pmf was 0.065 (200 replications, 12,000 rows), with 99% 0.04–0.08 in shorter runs; 99.9% keeps it
below 0.05 and costs little power (benchmarks/density_size_power.py).  Where two points on each side are missing, k = 0.1 is assumed and the
result says so.  Every test also reports p at k = 0, 0.05, 0.1, 0.2 and the smallest k at which
it stops rejecting at 5% (``k_breakdown``), so a reader can judge the k they find plausible.

Binomial window (the local-randomisation view of Cattaneo, Frandsen & Titiunik 2015, J. Causal
Inference 3(1)): inside a small symmetric window around the cutoff, units on either side are as
good as randomly placed, so the count on the right is Binomial(n_window, 1/2) when the window
holds the same length (exact support: the same number of support points) on each side.

That null also needs a flat density across the window.  Where the density slopes, the
Binomial(1/2) test rejects a smooth density with certainty at large n: on a lognormal(0, 2)
score at 0.1 (two 0.05-wide bins left of the cutoff, 200,000 rows; the counts per bin fall from
13,400 to 7,700 across the window) p was 1e-313.  Allowing a line with a jump instead (McCrary's
local linear comparison on the window's bins) still rejected in 83% of replications there,
because the curvature changes across the window and a side with two bins cannot show it.  So
the test is not used (NaN with a reason) where the density is visibly not flat next to the
cutoff: on each side, the counts per unit length of the 2nd to the ``FLAT_BINS``-th nearest bins
(support points) are compared by a chi-square test of homogeneity; the bin next to the cutoff is
left out, so sorting into it cannot pose as a sloping density.  If a side rejects flatness at
the 5% level, or if one side rejects and the other has too few bins to be checked, the window
test gives NaN ("density not flat next to the cutoff"); the other tests then decide, or none.
A 5% pre-test errs on the side of not using a count test whose null is in doubt.
Blind spot: sorting spread over a band wider than one bin makes the bins beyond the first look
sloped, so where the other tests cannot run either (fewer than four bins on a side), such
sorting leaves the candidate with no density p — reported as untested, not as "no sorting".
"""
from __future__ import annotations

import numpy as np
from scipy import stats as sps

from dataclasses import dataclass

from scipy import optimize

from ..bins import BinnedStats
from .density import DensityTest

FRANDSEN_K = 0.1             # assumed when the data cannot show their curvature
K_RANGE = (0.0, 0.05, 0.1, 0.2)
K_Z = 3.09                   # one-sided 99.9% upper bound on the curvature next to the cutoff
WINDOW_POINTS = 3            # support points per side in the binomial window (exact support)
FLAT_BINS = 6                # the flatness check uses the 2nd to 6th nearest bins on each side
FLAT_ALPHA = 0.05            # level of the flatness pre-test (module docstring)


def _nan_test(method, reason, h=float("nan")):
    nan = float("nan")
    return DensityTest(method, nan, nan, nan, nan, nan, nan, h, reason)


def _binom_two_sided(k, m, pi):
    """Two-sided binomial p-value: twice the smaller tail, capped at 1."""
    lo = sps.binom.cdf(k, m, pi)
    hi = sps.binom.sf(k - 1, m, pi)
    return float(min(1.0, 2 * min(lo, hi)))


@dataclass(frozen=True)
class FrandsenTest(DensityTest):
    """Frandsen (2017) test with the smoothness bound used and the p-value over a range of k.

    ``k``: the bound used for ``p_value``; ``k_source``: "data" (:func:`curvature_k`), "assumed"
    (too few support points) or "given"; ``p_by_k``: (k, p) pairs for ``K_RANGE``;
    ``k_breakdown``: smallest k whose p-value reaches 0.05 (0 when k = 0 does not reject).
    """

    k: float = float("nan")
    k_source: str = ""
    p_by_k: tuple = ()
    k_breakdown: float = float("nan")


def curvature_k(counts4, z: float = K_Z) -> float:
    """Upper bound on |p₋₁ − 2p₀ + p₊₁| / (p₋₁ + p₀ + p₊₁) from the counts at x₋₂, x₋₁, x₊₁, x₊₂.

    Least-squares quadratic ``α + βj + aj²`` in the support index j ∈ {−2, −1, 1, 2}; the
    relative second difference at j = 0 is ``2a / (3α + 2a)``, and its standard error uses the
    Poisson variance of each count.  Returns ``(|2â| + z·se(2â)) / (3α̂ + 2â)`` (NaN when the
    fitted mass is not positive).  Our construction, not Frandsen's.
    """
    j = np.array([-2.0, -1.0, 1.0, 2.0])
    c = np.asarray(counts4, float)
    R = np.column_stack([np.ones(4), j, j * j])
    L = np.linalg.solve(R.T @ R, R.T)          # coefficient weights
    alpha, _, a = L @ c
    mass = 3 * alpha + 2 * a
    if not mass > 0:
        return float("nan")
    se2a = 2 * np.sqrt((L[2] ** 2 * c).sum())
    return float((abs(2 * a) + z * se2a) / mass)


def _p_at_k(n0, m, k):
    lo, hi = max(1e-9, (1 - k) / 3), min(1 - 1e-9, (1 + k) / 3)
    pi = min(max(n0 / m, lo), hi)       # the admissible π closest to the observed share
    return _binom_two_sided(int(n0), m, pi)


def _breakdown(n0, m, alpha=0.05):
    """Smallest k whose p-value reaches α (p is non-decreasing in k)."""
    if _p_at_k(n0, m, 0.0) >= alpha:
        return 0.0
    share = n0 / m
    f = lambda k: _p_at_k(n0, m, k) - alpha
    top = abs(3 * share - 1)            # at this k the observed share is admissible: p = 1
    return float(optimize.brentq(f, 0.0, top, xtol=1e-6)) if f(top) >= 0 else float("nan")


def frandsen_test(stats: BinnedStats, cutoff: float, right_closed: bool = True,
                  k: float | None = None, drop=None) -> DensityTest:
    """Frandsen (2017) manipulation test for a discrete running variable.

    Parameters
    ----------
    stats : BinnedStats (exact support) of the running variable.
    cutoff : cutoff value; the support point holding it is tested against its two neighbours.
    k : smoothness bound (module docstring); None (default) takes it from the data's curvature
        next to the cutoff (:func:`curvature_k`); 0 is exact local linearity.
    drop : optional boolean mask of bins to leave out (heaped values).

    Returns
    -------
    FrandsenTest (a DensityTest): ``theta`` is ln(N₀ / (M/3)), the p-value is the largest over
    the admissible π; ``k``, ``k_source``, ``p_by_k`` and ``k_breakdown`` as in the class.

    Notes
    -----
    Frandsen (2017); the k = 0 case N₀ | M ~ Bin(M, 1/3) is derived in docs/methods.md
    ("Discrete support").  The data-driven k is our choice (module docstring).
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
    source = "given"
    if k is None:
        kk = (curvature_k(n[[i0 - 2, i0 - 1, i0 + 1, i0 + 2]])
              if 2 <= i0 <= x.size - 3 else float("nan"))
        k, source = (kk, "data") if np.isfinite(kk) else (FRANDSEN_K, "assumed")
    p = _p_at_k(n0, m, k)
    theta = float(np.log(n0 / (m / 3))) if n0 > 0 else float("-inf")
    se = float(np.sqrt((1 - 1 / 3) / (m / 3))) if m > 0 else float("nan")
    return FrandsenTest("frandsen", theta, se, p, float(nm), float(np1), float("nan"),
                        float(x[i0 + 1] - x[i0 - 1]) / 2, None, float(k), source,
                        tuple((kr, _p_at_k(n0, m, kr)) for kr in K_RANGE), _breakdown(n0, m))


def _sorted_bins(stats: BinnedStats, drop=None):
    """Sorted occupied pooled bins: x, n and each bin's length (1 for exact support points)."""
    return stats.support_counts(drop, lengths=True)


def flatness_p(x, n, length, side, cutoff) -> float:
    """Chi-square p of equal counts per unit length over a side's 2nd to FLAT_BINS-th nearest bins.

    NaN when fewer than two such bins.  Pearson's test of homogeneity with expected counts
    proportional to bin length (df = bins − 1).
    """
    i = np.flatnonzero(side)[np.argsort(np.abs(x[side] - cutoff), kind="stable")][1:FLAT_BINS]
    if i.size < 2 or n[i].sum() <= 0:
        return float("nan")
    e = n[i].sum() * length[i] / length[i].sum()
    return float(sps.chi2.sf(((n[i] - e) ** 2 / e).sum(), i.size - 1))


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
    x, n, length = _sorted_bins(stats, drop)
    right = x >= cutoff if right_closed else x > cutoff
    if right.all() or not right.any():
        return _nan_test("binomial window", "no data on one side of the cutoff")
    flat = [flatness_p(x, n, length, side, cutoff) for side in (~right, right)]
    if any(f < FLAT_ALPHA for f in flat if np.isfinite(f)):
        shown = ", ".join(f"{s} p = {f:.2g}" for s, f in zip(("left", "right"), flat)
                          if np.isfinite(f))
        return _nan_test("binomial window", "density not flat next to the cutoff "
                         f"(chi-square of equal density per unit length: {shown})")
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
