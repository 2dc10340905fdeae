"""Density tests: row-level equivalence, reference distributions, and fast size/power checks.

The full simulation (1,000 replications) is benchmarks/density_size_power.py.
"""
import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import stats as sps

from benchmarks.density_size_power import bins, draw, draw_discrete_scores
from scanner.diagnostics.density_discrete import curvature_k
from scanner.diagnostics import (density_suite, frandsen_test, lp_density_test, mccrary_test,
                                 window_count_test)
from scanner.diagnostics.heaping import deheaped, heap_tests


def test_lp_density_equals_rowlevel_wls():
    # Cattaneo, Jansson & Ma (2020): the density is the u-coefficient of a kernel-weighted
    # local quadratic fit of the empirical CDF on each side.  Reference: statsmodels WLS on rows.
    rng = np.random.default_rng(3)
    x = np.round(rng.normal(0, 1, 3000), 6)
    x = np.unique(x)                               # distinct values: exact bins hold one row each
    st = bins(x)
    h = 0.8
    t = lp_density_test(st, 0.1, bandwidth=h)
    N = x.size
    F = np.arange(1, N + 1) / N                    # F̂(X_i) = #{X_j ≤ X_i}/N for distinct values
    at = (x[x < 0.1].max() + x[x >= 0.1].min()) / 2
    for side, got in ((x >= 0.1, t.f_right), (x < 0.1, t.f_left)):
        u = x[side] - at
        w = np.clip(1 - np.abs(u) / h, 0, None)
        m = w > 0
        X = np.column_stack([np.ones(m.sum()), u[m], u[m] ** 2])
        ref = sm.WLS(F[side][m], X, weights=w[m]).fit().params[1]
        assert_allclose(got, ref, rtol=1e-9)


def test_window_count_test_matches_scipy_binomtest():
    # Cattaneo, Frandsen & Titiunik (2015): right-side count ~ Binomial(n, 1/2) in a symmetric
    # window; reference scipy.stats.binomtest (two-sided, 'twice the smaller tail' differs from
    # scipy's likelihood-ordering, so compare against both tails directly).
    x = np.repeat(np.arange(-5, 5, dtype=float), [50, 50, 50, 50, 40, 70, 50, 50, 50, 50])
    t = window_count_test(bins(x), 0.0, points=1)
    ref = min(1.0, 2 * min(sps.binom.cdf(70, 110, 0.5), sps.binom.sf(69, 110, 0.5)))
    assert_allclose(t.p_value, ref, rtol=1e-12)


def test_frandsen_k0_is_binomial_one_third():
    # Frandsen (2017): with a locally linear pmf, N0 | M ~ Binomial(M, 1/3) (docs/methods.md, Discrete support).
    x = np.repeat(np.arange(0, 6, dtype=float), [100, 100, 100, 160, 100, 100])
    t = frandsen_test(bins(x), 3.0, k=0.0)
    ref = 2 * sps.binom.sf(159, 360, 1 / 3)
    assert_allclose(t.p_value, ref, rtol=1e-12)
    assert frandsen_test(bins(x), 3.0, k=0.1).p_value >= t.p_value


def test_frandsen_holds_size_on_twenty_points():
    # Size at the 5% level on a 20-point support (Binomial(19, 0.4) pmf, cutoff at every
    # interior point), simulation design of our own; bound 0.07 as in the issue.
    rng = np.random.default_rng(5)
    rej = []
    for _ in range(60):
        st = bins(rng.binomial(19, 0.4, 10_000).astype(float))
        for c in (5.0, 6.0, 7.0, 8.0, 9.0, 10.0):
            rej.append(frandsen_test(st, c).p_value < 0.05)
    assert np.mean(rej) <= 0.07


def test_design_rule_picks_frandsen_for_few_support_points():
    rng = np.random.default_rng(6)
    st = bins(rng.binomial(19, 0.4, 5000).astype(float))
    name, chosen, tests = density_suite(st, 8.0)
    assert name == "frandsen" and set(tests) >= {"local_polynomial", "mccrary", "binomial_window"}
    st2 = bins(rng.normal(0, 1, 20_000), 0.001)
    assert density_suite(st2, 0.0)[0] == "local_polynomial"


def test_heaps_alone_do_not_make_sorting():
    # A third of values rounded to multiples of 5 (heaping as in Barreca, Lindo & Waddell 2016):
    # the de-heaped test should not reject a smooth underlying density at a heap.
    rng = np.random.default_rng(8)
    rej_raw, rej_clean = [], []
    for _ in range(20):
        v = np.rint(rng.normal(50, 12, 20_000))
        r = rng.random(v.size) < 1 / 3
        v = np.where(r, 5 * np.rint(v / 5), v)
        st = bins(v)
        clean = deheaped(st, heap_tests(st))
        rej_raw.append(lp_density_test(st, 45.0).p_value < 0.05)
        rej_clean.append(lp_density_test(clean, 45.0).p_value < 0.05)
    assert np.mean(rej_raw) > 0.5          # the heap itself looks like a density jump ...
    assert np.mean(rej_clean) <= 0.2       # ... and disappears once its excess is removed


@pytest.mark.parametrize("design", ["normal", "beta"])
def test_density_size_fast(design):
    # Fast version of the benchmark's size check (1,000 reps there): tolerant bound here.
    rng = np.random.default_rng(11)
    rej = [lp_density_test(bins(draw(rng, design, 10_000, 0.0), 0.001), 0.0).p_value < 0.05
           for _ in range(60)]
    assert np.mean(rej) <= 0.13


def test_density_power_fast():
    # 20% density jump at n = 10,000, normal design: both tests detect it most of the time.
    # The issue asks for power >= 0.8; the benchmark (1,000 reps) measures it, this bound only
    # catches a collapse (80 reps: a true 0.8 gives 54 or fewer rejections with probability
    # 0.006, scipy.stats.binom.cdf(54, 80, 0.8)).
    rng = np.random.default_rng(12)
    lp, mc = [], []
    for _ in range(80):
        st = bins(draw(rng, "normal", 10_000, 0.2), 0.001)
        lp.append(lp_density_test(st, 0.0).p_value < 0.05)
        mc.append(mccrary_test(st, 0.0).p_value < 0.05)
    assert np.mean(mc) >= 0.75
    assert np.mean(lp) >= 0.68


def test_density_pilot_recovers_normal_derivatives():
    # The bandwidth pilot's f''(0), f'''(0) on N(0, 1) draws against the analytic values
    # f'' = -phi(0) (scipy.stats.norm.pdf) and f''' = 0; a noisy f''' pilot pulled the chosen
    # bandwidth down and cost the test power (benchmarks/results/density.md).
    from scanner.diagnostics.density_lp import _pilot_pooled, cdf_points
    rng = np.random.default_rng(13)
    f2, f3 = [], []
    for _ in range(60):
        x, n, F, N = cdf_points(bins(rng.normal(0, 1, 10_000), 0.001))
        sd = np.sqrt((n * x ** 2).sum() / N - ((n * x).sum() / N) ** 2)
        a, b = _pilot_pooled(x, n, F, sd)
        f2.append(a)
        f3.append(b)
    assert abs(np.mean(f2) + sps.norm.pdf(0)) < 0.05
    assert abs(np.mean(f3)) < 0.15 and np.std(f3) < 0.5


def test_density_bandwidth_search_on_the_window_equals_the_full_sums():
    # The null-MSE search fits only bins inside the widest bandwidth and adds the others'
    # influence values in closed form; reference: the same criterion summed over every bin
    # (docs/methods.md, "Density tests"), written out here directly, at every grid point.
    from scanner.diagnostics import density_lp as D
    from scanner.estimate.mse import robust_scale

    def full_sums(u, n, F, N, left, right, hs):
        f2, f3 = D._pilot_pooled(u, n, F, robust_scale(u, n))
        out = []
        for h in hs:
            (fl, ell_l, _), (fr, ell_r, _) = (D._side_fit(u, n, F, s, h, 2, "triangular")
                                              for s in (left, right))
            bias = (n * (ell_r - ell_l) * (f2 / 6 * u ** 3 + f3 / 24 * u ** 4)).sum()
            psi = D._psi(n, ell_r, fr) - D._psi(n, ell_l, fl)
            out.append(bias ** 2 + (n * psi ** 2).sum() / N ** 2)
        return np.array(out)

    rng = np.random.default_rng(14)
    for design, jump in (("normal", 0.0), ("beta", 0.2), ("normal", 0.2)):
        x, n, F, N = D.cdf_points(bins(draw(rng, design, 5_000, jump), 0.001))
        right = x >= 0
        hs, mse = D._mse_curve(x, n, F, N, ~right, right, 2, "triangular")
        assert hs.size == 20 and np.isfinite(mse).all()
        assert_allclose(mse, full_sums(x, n, F, N, ~right, right, hs), rtol=1e-9)
        assert D._mse_bandwidth(x, n, F, N, ~right, right, 2, "triangular") == hs[np.argmin(mse)]


def test_frandsen_k_from_curvature_on_exact_counts():
    # Counts on a quadratic pmf 100 − 3j² (j = −2 … 2, noiseless): the relative second
    # difference at j = 0 is |−6| / (97 + 100 + 97) = 6/294 by hand; with z = 0 it is exact.
    c = np.array([88.0, 97.0, 97.0, 88.0])
    assert_allclose(curvature_k(c, z=0.0), 6 / 294, rtol=1e-12)
    assert curvature_k(c) > curvature_k(c, z=0.0)


def test_frandsen_reports_range_of_k_and_breakdown():
    # p at each k of the range equals scipy's binomial tail at the nearest admissible π, and at
    # k_breakdown the p-value is 0.05 (scipy.stats.binom as reference).
    x = np.repeat(np.arange(0, 7, dtype=float), [100, 100, 100, 160, 100, 100, 100])
    t = frandsen_test(bins(x), 3.0)
    assert t.k_source == "data" and t.k >= 0
    for k, p in t.p_by_k:
        pi = min((1 + k) / 3, 160 / 360)
        assert_allclose(p, min(1.0, 2 * sps.binom.sf(159, 360, pi)), rtol=1e-12)
    pi = (1 + t.k_breakdown) / 3
    assert_allclose(2 * sps.binom.sf(159, 360, pi), 0.05, atol=1e-4)
    # Too few points for the curvature: k = 0.1 assumed, and said so.
    assert frandsen_test(bins(x[x <= 4]), 3.0).k_source == "assumed"


def test_frandsen_power_against_twenty_percent_extra_mass():
    # Target from the issue: power ≥ 0.8 against 20% extra mass at the cutoff point with 6,000
    # rows on the three points; flat pmf on 20 points (invented design, benchmarks/
    # density_size_power.py runs 500 replications).  The old fixed k = 0.1 cannot reach it:
    # its admissible π reaches 1.1/3, and 20% extra gives 1.2/3.2.
    rng = np.random.default_rng(12)
    rej, rej_fixed = [], []
    for _ in range(40):
        x, c = draw_discrete_scores(rng, "flat", 0.2)
        st = bins(x)
        rej.append(frandsen_test(st, c).p_value < 0.05)
        rej_fixed.append(frandsen_test(st, c, k=0.1).p_value < 0.05)
    assert np.mean(rej) >= 0.8 and np.mean(rej_fixed) < 0.6


def test_frandsen_size_on_irregular_discrete_designs():
    # Size at 5% with k from the data: half-integer lattice (cutoff between recorded values) and
    # a five-point score (invented designs, benchmarks/density_size_power.py).
    rng = np.random.default_rng(13)
    for design in ("halfint", "fivepoint", "flat"):
        rej = [frandsen_test(bins(x), c).p_value < 0.05
               for x, c in (draw_discrete_scores(rng, design, 0.0) for _ in range(40))]
        assert np.mean(rej) <= 0.1, design
