"""Jumps at many points computed together equal one fit per point, and row-level WLS."""
import numpy as np
import pytest
import statsmodels.api as sm

from scanner.diagnostics.placebo import placebo_test
from scanner.engines.local import exact_bins
from scanner.estimate.batch import _one_by_one, jumps_at
from scanner.estimate.local import side_data


def _bins(x, y):
    st = exact_bins("x", x, {"y": y})
    return side_data(st, "y", 0.0)


def _designs():
    rng = np.random.default_rng(8)
    n = 3000
    cont = rng.normal(0, 10, n)
    half = np.round(rng.normal(0, 6, n) * 2) / 2 + 0.5       # half-integer lattice
    five = rng.choice([-10.0, -5.0, 0.0, 5.0, 10.0, 15.0], n)
    yield "continuous", cont, 0.2 + 0.01 * cont + rng.normal(size=n)
    # uptake exactly 0 below 3 and 0/1 above it: a side with no variation inside some windows
    yield "one side constant", half, np.where(half >= 3, rng.random(n) < 0.6, 0.0).astype(float)
    yield "coarse", five, (rng.random(n) < 0.3 + 0.02 * five).astype(float)


@pytest.mark.parametrize("kernel", ["triangular", "uniform", "epanechnikov"])
@pytest.mark.parametrize("degree", [0, 1, 2])
def test_jumps_at_equal_one_fit_per_point(kernel, degree):
    for name, x, y in _designs():
        d = _bins(x, y)
        for h in (2.0, 5.0, 12.0):
            pts = np.concatenate([np.arange(-20, 21, 1.5), [3.0, 0.5, -0.5]])
            got = jumps_at(d.u, d.n, d.s1, d.s2, pts, h, kernel, degree)
            ref = _one_by_one(d.u, d.n, d.s1, d.s2, pts, h, kernel, degree, 4)
            for g, r in zip(got, ref):
                assert np.array_equal(np.isnan(g), np.isnan(r)), (name, h)
                fin = np.isfinite(r)
                np.testing.assert_allclose(g[fin], r[fin], rtol=1e-9, atol=1e-12,
                                           err_msg=f"{name} h={h}")
                assert np.array_equal(np.isinf(g), np.isinf(r))


def test_jumps_at_equal_row_level_statsmodels_wls():
    # Reference: statsmodels WLS of y on (1, D, v, D·v) with triangular weights and HC1
    # errors on the rows inside each window (Hahn, Todd & van der Klaauw 2001 estimator).
    rng = np.random.default_rng(3)
    x = rng.integers(-40, 41, 4000).astype(float)
    y = 0.3 + 0.01 * x + 0.2 * (x >= 7) + rng.normal(size=x.size)
    d = _bins(x, y)
    pts = np.array([-12.0, 7.0, 20.0])
    jump, se, _ = jumps_at(d.u, d.n, d.s1, d.s2, pts, 9.0, "triangular", 1)
    for p, j, s in zip(pts, jump, se):
        v = x - p
        w = np.clip(1 - np.abs(v) / 9.0, 0, None)
        keep = w > 0
        D = (v >= 0).astype(float)
        X = np.column_stack([np.ones(keep.sum()), D[keep], v[keep], D[keep] * v[keep]])
        fit = sm.WLS(y[keep], X, weights=w[keep]).fit(cov_type="HC1")
        assert j == pytest.approx(fit.params[1], rel=1e-10, abs=1e-12)
        assert s == pytest.approx(fit.bse[1], rel=1e-8)


def test_placebo_test_unchanged_by_batching():
    # The placebo p-value and z's equal those of one fit_jump per placebo cutoff.
    rng = np.random.default_rng(5)
    x = np.round(rng.uniform(-50, 50, 8000), 1)
    y = (rng.random(x.size) < 0.2 + 0.004 * x + 0.3 * (x >= 0)).astype(float)
    d = _bins(x, y)
    res = placebo_test(None, d, 0.0, 6.0, 4.0)
    assert res.n_placebos >= 10
    ref = []
    for side, sign in ((~d.right, -1), (d.right, 1)):
        u = d.u[side]
        lim = -u.min() if sign < 0 else u.max()
        pts = sign * np.arange(6.0, lim - 6.0 + 1e-12, 6.0)[:15]
        ref += [z for z in _one_by_one(u, d.n[side], d.s1[side], d.s2[side], pts, 6.0,
                                      "triangular", 1, 4)[2] if np.isfinite(z)]
    np.testing.assert_allclose(res.z, ref, rtol=1e-9)


def test_honest_interval_bias_is_the_worst_case_bias_of_its_weights():
    # The interval's bias bound must be worst_case_bias (checked against a linear programme in
    # test_honest_bias.py; Armstrong & Kolesár 2018) of the estimator's own weights, formed
    # here independently from coef_weights, and its critical value honest_cv(B/se) (checked
    # against scipy.stats.ncx2).
    from scanner.estimate.honest import honest_cv, honest_interval, worst_case_bias
    from scanner.estimate.robust import coef_weights
    from scanner.estimate.kernels import kernel as kernel_fn
    compared = 0
    for name, x, y in _designs():
        d = _bins(x, y)
        for h in (4.0, 11.0):
            w_all, u_all, right_all = [], [], []
            got = honest_interval(d, h, 0.003, "triangular", 1)
            try:
                for is_right in (False, True):
                    side = d.right if is_right else ~d.right
                    u, n = d.u[side], d.n[side]
                    w = kernel_fn("triangular")(u / h)
                    m = w > 0
                    L, _ = coef_weights(u[m], n[m], w[m], 1)
                    w_all.append(n[m] * L[0])
                    u_all.append(u[m])
                    right_all.append(np.full(m.sum(), is_right))
            except np.linalg.LinAlgError:        # too few values on a side: no interval
                assert np.isnan(got.max_bias), name
                continue
            ref = worst_case_bias(np.concatenate(u_all), np.concatenate(w_all),
                                  np.concatenate(right_all), 0.003)
            np.testing.assert_allclose(got.max_bias, ref, rtol=1e-12, err_msg=name)
            se = (got.ci_high - got.ci_low) / (2 * got.cv)
            np.testing.assert_allclose(got.cv, honest_cv(ref / se), rtol=1e-9, err_msg=name)
            compared += 1
    assert compared >= 4


def test_honest_by_M_equals_one_interval_per_M():
    # The bias-aware intervals at several curvature bounds share the estimate, SE and bias
    # integral; each must equal honest_interval at that M exactly.
    from scanner.estimate.honest import honest_by_M, honest_interval
    for name, x, y in _designs():
        d = _bins(x, y)
        for h in (4.0, 11.0):
            for row in honest_by_M(d, h, 0.003, "triangular", 1, factors=(0.0, 0.5, 1.0, 4.0)):
                ref = honest_interval(d, h, row["M"], "triangular", 1)
                for k in ("ci_low", "ci_high", "max_bias", "p_value"):
                    a, b = row[k], getattr(ref, k)
                    assert (np.isnan(a) and np.isnan(b)) or a == b, (name, h, k)


def test_no_standard_error_means_no_test():
    # Four rows, one per bin, two a side: a local linear fit is exact and HC1 has no degrees
    # of freedom left (n = 2(p + 1)).  There is no SE, so no p-value — it was reported as 0.
    from scanner.estimate.local import fit_jump
    d = _bins(np.array([-2.0, -1.0, 1.0, 2.0]), np.array([0.1, 0.2, 0.9, 0.7]))
    f = fit_jump(None, "", 0.0, 5.0, "triangular", 1, data=d)
    assert np.isnan(f.p_value) and np.isnan(f.jump) and "standard error" in f.reason
    jump, se, z = jumps_at(d.u, d.n, d.s1, d.s2, [0.0], 5.0, "triangular", 1, min_bins=4)
    assert np.isnan(jump[0]) and np.isnan(z[0])


def test_placebo_points_on_a_huge_range_do_not_exhaust_memory():
    # A junk value of 1e300 in the running variable: the placebo grid is cut at 15 points a
    # side instead of being formed over the whole range first (which raised ValueError).
    rng = np.random.default_rng(1)
    x = np.r_[rng.integers(-30, 31, 3000).astype(float), 1e300]
    y = (rng.random(x.size) < 0.3 + 0.3 * (x >= 0)).astype(float)
    d = _bins(x, y)
    res = placebo_test(None, d, 0.0, 4.0, 5.0)
    assert 0 < res.n_placebos <= 30
    # and the placebos on the junk value's side are tested, as one fit per point tests them
    # (weightless bins at 1e300 once made V² infinite and every fit there NaN)
    assert any(c > 0 for c in res.cutoffs) and any(c < 0 for c in res.cutoffs)
    right = d.right
    pts = np.array([6.0, 12.0, 18.0])
    args = (d.u[right], d.n[right], d.s1[right], d.s2[right], pts, 5.0, "triangular", 1)
    got = jumps_at(*args)
    ref = _one_by_one(*args, 4)
    assert np.isfinite(got[2]).all()
    np.testing.assert_allclose(got[2], ref[2], rtol=1e-9)


def test_placebos_where_uptake_is_constant_do_not_count():
    # Everyone treated from 0 on: every placebo right of the cutoff sits in constant uptake, its
    # z is 0 by construction, and it counted as a placebo that found nothing, making the
    # placebo p look reassuring.  Only the left side's placebos count now.
    rng = np.random.default_rng(6)
    x = rng.integers(-60, 61, 12000).astype(float)
    y = np.where(x >= 0, 1.0, (rng.random(x.size) < 0.2 + 0.002 * x)).astype(float)
    d = _bins(x, y)
    res = placebo_test(None, d, 0.0, 5.0, 8.0)
    assert res.n_placebos > 0 and all(c < 0 for c in res.cutoffs)
    right = d.right
    z = jumps_at(d.u[right], d.n[right], d.s1[right], d.s2[right], [10.0, 20.0], 5.0)[2]
    assert np.isnan(z).all()


def test_scan_placebos_skip_a_constant_side():
    # In the scan the placebo check was given the variance-floored side data: a side where
    # uptake is exactly 1 looked spread out, and its placebo points counted (z about 0) as
    # placebos that found nothing.  Through the scan only the left side's placebos count, as
    # on the raw bins.
    import pandas as pd
    import scanner
    from scanner.estimate.local import side_data
    rng = np.random.default_rng(6)
    x = rng.integers(-60, 61, 12000).astype(float)
    y = np.where(x >= 0, 1.0, (rng.random(x.size) < 0.2 + 0.002 * x)).astype(float)
    spec = {"running": [{"column": "x"}], "treatments": {"columns": ["d"]},
            "search": {"round_numbers": True, "discover": False}}
    res = scanner.scan(spec, data=pd.DataFrame({"x": x, "d": y}))
    row = next(r for r in res.rows if r["cutoff"] == 0.0)
    raw = side_data(res.stats["x"], "d", 0.0)
    ref = placebo_test(None, raw, 0.0, row["bandwidth"], row["z"])
    assert ref.n_placebos > 0 and all(c < 0 for c in ref.cutoffs)
    assert row["placebo_n"] == ref.n_placebos
