"""Exact worst-case bias of the bias-aware interval, checked by numerical maximisation.

Reference: Armstrong & Kolesár (2018, Econometrica 86(2)) — the bias-aware interval needs the
largest bias of the linear estimate over the smoothness class.  For the class |μ''| ≤ M on each
side, scipy.optimize.linprog maximises Σ w_i f(a_i) over f on a fine grid whose second divided
differences are bounded by M/2 (every f of the class satisfies them, so the linear programme is an
upper bound that becomes exact as the grid is refined); the closed form must equal it.
"""
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, optimize

from benchmarks.coverage_designs import draw_discrete, to_bins
from scanner.estimate import side_data
from scanner.estimate.robust import (coef_weights, curvature_bound, honest_interval,
                                     side_bias_integral, taylor_bias_bound, worst_case_bias)


def lp_side(a, w, M, K=200):
    """Largest Σ w_i f(a_i) over grid values with |2·f[t_{j-1}, t_j, t_{j+1}]| ≤ M (linprog)."""
    t = np.unique(np.r_[np.linspace(0, a.max(), K), a])
    n = t.size
    A = np.zeros((n - 2, n))
    for j in range(1, n - 1):
        h0, h1 = t[j] - t[j - 1], t[j + 1] - t[j]
        A[j - 1, j - 1: j + 2] = np.array([1 / h0, -1 / h0 - 1 / h1, 1 / h1]) * 2 / (h0 + h1)
    c = np.zeros(n)
    np.add.at(c, np.searchsorted(t, a), w)
    eq = np.zeros((2, n))
    eq[0, 0] = eq[1, 1] = 1          # f(0) = f(t₁) = 0: the weights ignore lines anyway
    res = optimize.linprog(-c, A_ub=np.r_[A, -A], b_ub=np.full(2 * (n - 2), M), A_eq=eq,
                           b_eq=[0, 0], bounds=[(None, None)] * n, method="highs")
    assert res.status == 0
    return -res.fun


def side_weights(a, n, h, p):
    w = np.clip(1 - a / h, 0, None)
    m = w > 0
    L, _ = coef_weights(a[m], n[m], w[m], p)
    return a[m], n[m] * L[0]


@pytest.mark.parametrize("p", [1, 2])
def test_worst_case_bias_equals_linear_programme(p):
    # Uneven invented counts on 8 points; p = 2 weights cancel μ'' = const, so their G changes
    # sign and the zero-crossing branch of the closed form is exercised.
    a = np.arange(1, 9) / 8.0 - 1 / 16
    n = np.array([30, 25, 40, 20, 35, 30, 25, 30.0])
    a, w = side_weights(a, n, 0.8, p)
    exact = side_bias_integral(a, w)
    lp = lp_side(a, w, 1.0)
    assert exact <= lp * (1 + 1e-6)   # up to the solver's tolerance
    assert_allclose(exact, lp, rtol=2e-3)


def test_random_weights_against_linear_programme():
    # Arbitrary weights that reproduce constants and lines (projection of a random vector).
    rng = np.random.default_rng(3)
    a = np.sort(rng.uniform(0.01, 1, 12))
    R = np.column_stack([np.ones_like(a), a])
    w = rng.normal(size=12)
    w -= R @ np.linalg.lstsq(R, w, rcond=None)[0]
    w += R @ np.linalg.solve(R.T @ R, np.array([1.0, 0.0]))   # Σw = 1, Σwa = 0
    assert_allclose([w.sum(), (w * a).sum()], [1, 0], atol=1e-12)
    assert_allclose(side_bias_integral(a, w), lp_side(a, w, 2.0, 300) / 2.0, rtol=2e-3)


def test_bias_is_attained_by_a_curve_of_the_class():
    # Lower bound: the curve with f'' = M·sign(G) has exactly the closed-form bias (scipy quad).
    a = np.arange(1, 9) / 8.0 - 1 / 16
    a, w = side_weights(a, np.full(8, 10.0), 0.8, 2)
    G = lambda t: float(np.sum(w * np.clip(a - t, 0, None)))
    f = lambda x: integrate.quad(lambda t: (x - t) * np.sign(G(t)), 0, x, points=a[a < x],
                                 limit=200)[0]
    assert_allclose(sum(wi * f(ai) for wi, ai in zip(w, a)), side_bias_integral(a, w), rtol=1e-7)


def test_exact_bias_is_about_half_the_taylor_bound_for_local_linear():
    # METHODS.md §7b (from memory): for triangular local linear weights on a dense design the
    # Taylor-remainder bound Σ|ℓ|u²·M/2 is about 1.9 times the exact worst case.
    a = (np.arange(200) + 0.5) / 200
    a, w = side_weights(a, np.ones(200), 1.0, 1)
    ratio = taylor_bias_bound(a, w, 1.0) / side_bias_integral(a, w)
    assert 1.8 < ratio < 2.0


def test_honest_interval_uses_the_exact_bias():
    # Would fail with the Taylor bound (1.9× larger): B̄ must equal the linear programme's value.
    x, y, _ = draw_discrete(np.random.default_rng(8), 3000)
    d = side_data(to_bins(x, {"y": y}), "y", 0.0)
    h, M = 0.55, 6.0
    hon = honest_interval(d, h, M)
    lp = 0.0
    for side in (~d.right, d.right):
        a, w = side_weights(np.abs(d.u[side]), d.n[side], h, 1)
        lp += lp_side(a, w, M)
    assert_allclose(hon.max_bias, lp, rtol=2e-3)
    assert_allclose(hon.max_bias, worst_case_bias(d.u[np.abs(d.u) < h],
                                                  _weights(d, h), d.right[np.abs(d.u) < h], M))


def _weights(d, h):
    out = np.zeros(d.u.size)
    for side in (~d.right, d.right):
        a, w = side_weights(np.abs(d.u[side]), d.n[side], h, 1)
        idx = np.flatnonzero(side)[np.abs(d.u[side]) < h]
        out[idx] = w
    return out[np.abs(d.u) < h]


def test_exact_bias_shortens_the_discrete_design_interval():
    # Discrete design of benchmarks/coverage_cct.py (invented; μ quadratic, |μ''| = 6 with the
    # worst-case signs): at the same M and each interval at its own shortest bandwidth, the exact
    # worst-case bias gives a clearly shorter interval than the Taylor bound (the benchmark: 0.382
    # against 0.536 before, with 500 replications) and still covers the true jump 0.5.
    from scanner.estimate.robust import honest_best
    rng = np.random.default_rng(21)
    ratio, cover = [], []
    for _ in range(40):
        x, y, tau = draw_discrete(rng)
        d = side_data(to_bins(x, {"y": y}), "y", 0.0)
        M = curvature_bound(d)
        exact, _ = honest_best(d, M)
        taylor, _ = honest_best(d, M, bias="taylor")
        ratio.append((exact.ci_high - exact.ci_low) / (taylor.ci_high - taylor.ci_low))
        cover.append(exact.ci_low <= tau <= exact.ci_high)
    assert np.median(ratio) < 0.85 and np.mean(cover) >= 0.9, (np.median(ratio), np.mean(cover))


def test_search_bias_bound_takes_the_upper_curvature_bound():
    # Reference: statsmodels OLS of y on (1, u, u²) over the rows of each side within twice the
    # bandwidth, HC3 covariance; M = max over sides of |2β₂| + z·2·se(β₂), z = CURVATURE_Z (the
    # one-sided 80% upper end).  Integer score, so the bins are the rows.  The point estimate
    # max |2β₂| alone (the earlier rule) is below it.
    import pandas as pd
    import statsmodels.api as sm
    from scanner.discover import bias_bound
    from scanner.estimate.honest import CURVATURE_Z
    from .conftest import binned
    rng = np.random.default_rng(17)
    x = rng.integers(0, 100, 20_000).astype(float)
    d = (rng.random(x.size) < 0.3 + 0.004 * x - 0.00003 * (x - 50) ** 2).astype(float)
    c, h = 50.0, 10.0
    bb = bias_bound(binned(pd.DataFrame({"x": x, "d": d}), "x", ["d"], ["d"]), "d", c, h)
    u = x - c
    upper, point = [], []
    for side in (u < 0, u >= 0):
        m = side & (np.abs(u) < 2 * h)
        fit = sm.OLS(d[m], np.column_stack([np.ones(m.sum()), u[m], u[m] ** 2])).fit(cov_type="HC3")
        point.append(abs(2 * fit.params[2]))
        upper.append(abs(2 * fit.params[2]) + CURVATURE_Z * 2 * fit.bse[2])
    assert_allclose(bb.curvature, max(upper), rtol=1e-9)
    assert_allclose(bb.bound, 0.5 * bb.curvature * bb.weight_sum, rtol=1e-12)
    assert bb.curvature > 1.2 * max(point)


def test_search_bias_bound_is_not_zero_where_curvature_is_unknown():
    # Two support values a side within twice the bandwidth: a quadratic cannot be fitted, so
    # the curvature — and the bias of a searched location — is unknown: NaN, never 0 (which
    # would test the searched break as if it had no smoothing bias).
    from scanner.discover import bias_bound
    from scanner.engines.local import exact_bins
    rng = np.random.default_rng(2)
    x = rng.choice([-20.0, -2.0, -1.0, 1.0, 2.0, 20.0], 3000)
    d = (rng.random(x.size) < 0.3 + 0.02 * x).astype(float)
    st = exact_bins("x", x, {"d": d})
    bb = bias_bound(st, "d", 0.0, 2.5)
    assert np.isnan(bb.bound) and np.isnan(bb.p_value(0.1, 0.02))
    assert np.isfinite(bias_bound(st, "d", 0.0, 15.0).bound)    # 2h reaches ±20: three a side


def test_search_bias_bound_needs_both_sides():
    # A five-point-like lattice, uptake exactly 0 left of 7.5 and two values right of it within
    # 2h: the right side's curvature is unknown, and the left side's zero curvature says nothing
    # about it — NaN, not a zero allowance (which gave p = 0.012 for a jump of 0.05, se 0.02).
    from scanner.discover import bias_bound
    from scanner.engines.local import exact_bins
    rng = np.random.default_rng(4)
    x = rng.choice([-10.0, -5.0, 0.0, 5.0, 10.0, 15.0], 4000)
    d = np.where(x > 7.5, rng.random(x.size) < 0.3 + 0.01 * x, 0.0).astype(float)
    st = exact_bins("x", x, {"d": d})
    bb = bias_bound(st, "d", 7.5, 10.0)
    assert np.isnan(bb.curvature) and np.isnan(bb.p_value(0.05, 0.02))
