"""A smooth, skewed running variable must not be called "sorting".

Design (simulation, invented): X ~ lognormal(0, 2) (a standard skewed law; its density has its
mode at e^{-4} and falls by half between 0.5 and 1.2), 200,000 rows in fixed-width bins of 0.05
from 0, no sorting anywhere.  At a cutoff of 0.1 two bins lie left of the cutoff; at 1.0 the
plain standard deviation (hundreds of units) is no scale for a density bandwidth.
"""
import numpy as np
from scipy import stats as sps

from scanner.diagnostics.density_discrete import flatness_p, window_count_test
from scanner.diagnostics.sorting import density_suite
from scanner.estimate.mse import robust_scale
from tests.test_diagnostics_density import bins


def _draw(seed):
    return np.random.default_rng(seed).lognormal(0.0, 2.0, 200_000)


def test_lognormal_score_raises_no_sorting_flag():
    # Old code: p ≈ 1e-313 at 0.1 (binomial window on a sloping density) and ≈ 1e-174 at 1.0
    # (bandwidth cap from the plain sd).  A smooth density: no test may reject at 0.1%.
    for seed in (1, 2, 3):
        st = bins(_draw(seed), 0.05)
        for c in (0.1, 1.0):
            name, t, _ = density_suite(st, c)
            assert not (t.p_value < 0.001), (seed, c, name, t.p_value)


def test_lognormal_density_still_detects_sorting_at_one():
    # Power on the same skewed law: 20% more density right of 1.0 (left rows thinned by 1/1.2,
    # the alternative of benchmarks/density_size_power.py) is found by the local polynomial test.
    rng = np.random.default_rng(4)
    x = rng.lognormal(0.0, 2.0, 200_000)
    x = x[(x >= 1.0) | (rng.random(x.size) < 1 / 1.2)]
    name, t, _ = density_suite(bins(x, 0.05), 1.0)
    assert name == "local_polynomial" and t.p_value < 0.001


def test_robust_scale_is_silverman_spread():
    # Silverman (1986) eq. 3.30: min(sd, IQR/1.34); lognormal(0, 2) IQR = e^{2·0.6745} − e^{−2·0.6745}
    # (quantiles of the normal, scipy) = 3.59, so the scale is about 2.66 while sd is far larger.
    x = _draw(5)
    s = robust_scale(x, np.ones(x.size))
    iqr = np.exp(2 * sps.norm.ppf(0.75)) - np.exp(2 * sps.norm.ppf(0.25))
    assert abs(s - iqr / 1.349) < 0.05 and s < x.std() / 10


def test_flatness_check_against_scipy_chisquare():
    # Pearson homogeneity with expected counts proportional to length; reference
    # scipy.stats.chisquare with the same expected counts.
    x = np.arange(-5.5, 5.5, 1.0)
    n = np.array([40, 44, 52, 47, 50, 55, 61, 49, 58, 51, 60], float)
    length = np.ones(x.size)
    right = x >= 0
    got = flatness_p(x, n, length, right, 0.0)
    obs = n[right][1:6]
    assert np.isclose(got, sps.chisquare(obs, np.full(obs.size, obs.mean())).pvalue, rtol=1e-12)


def test_window_test_is_not_used_on_a_sloping_density():
    # Counts falling by 10% per point on both sides: a count window's Binomial(1/2) null fails.
    x = np.repeat(np.arange(-8, 8, dtype=float), (2000 * 0.9 ** np.arange(16)).astype(int))
    t = window_count_test(bins(x), 0.0)
    assert np.isnan(t.p_value) and "not flat" in t.reason


def test_window_test_still_sees_sorting_on_a_flat_density_with_two_bins_left():
    # Flat density on [0, 40) in unit bins, cutoff 2 (two bins on the left, so the local
    # polynomial and McCrary tests cannot run); the window test is the design rule's choice.
    # No sorting: it must not reject at 1%.  Extra mass of 60% in the bin [2, 3) next to the
    # cutoff: it must reject.  (Sorting spread over [2, 5) makes the bins beyond the first look
    # sloped, and the window test then drops out: a known blind spot, no false "no sorting".)
    # Reference for the p-value under no sorting: the exact binomial (scipy) on the window counts.
    rng = np.random.default_rng(8)
    x = rng.uniform(0, 40, 40_000)
    name, t, tests = density_suite(bins(x, 1.0), 2.0)
    assert name == "binomial_window" and t.p_value > 0.01
    nl, nr = int(((x >= 0) & (x < 2)).sum()), int(((x >= 2) & (x < 4)).sum())
    ref = min(1.0, 2 * min(sps.binom.cdf(nr, nl + nr, 0.5), sps.binom.sf(nr - 1, nl + nr, 0.5)))
    assert np.isclose(t.p_value, ref, rtol=1e-9)
    extra = rng.uniform(2, 3, 600)
    name, t, _ = density_suite(bins(np.concatenate([x, extra]), 1.0), 2.0)
    assert name == "binomial_window" and t.p_value < 0.001
