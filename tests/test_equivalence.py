"""Binned estimates equal row-level fits (statsmodels WLS with HC1; numpy 2SLS)."""
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from scanner.estimate import fit_fuzzy, fit_jump
from scanner.estimate.local import fit_jumps, side_data_many
from scanner.estimate.kernels import KERNELS

from .conftest import binned


def rowlevel(x, y, c, h, kernel, degree):
    """Pooled WLS y ~ D + poly(x) + D·poly(x) on rows with positive kernel weight (statsmodels)."""
    u = x - c
    w = KERNELS[kernel](u / h)
    m = w > 0
    D = (u >= 0).astype(float)
    cols = [np.ones_like(u), D]
    for k in range(1, degree + 1):
        cols += [u ** k, D * u ** k]
    Z = np.column_stack(cols)[m]
    return sm.WLS(y[m], Z, weights=w[m]).fit(cov_type="HC1")


@pytest.mark.parametrize("kernel", list(KERNELS))
@pytest.mark.parametrize("degree", [0, 1, 2])
def test_exact_bins_equal_statsmodels_wls_hc1(integer_design, kernel, degree):
    # Reference: statsmodels WLS, cov_type="HC1", same rows and kernel weights.
    df = integer_design
    st = binned(df, "x", ["d", "y"], ["d"])
    for c, h in ((0.0, 17.0), (5.0, 23.5), (-12.0, 9.0)):
        ref = rowlevel(df.x.to_numpy(), df.y.to_numpy(), c, h, kernel, degree)
        fit = fit_jump(st, "y", c, h, kernel=kernel, degree=degree)
        assert_allclose(fit.jump, ref.params[1], rtol=1e-9)
        assert_allclose(fit.se, ref.bse[1], rtol=1e-9)


def test_columns_fitted_together_equal_statsmodels_one_by_one(integer_design):
    # Reference: statsmodels WLS, cov_type="HC1", one fit per column on its own rows.  Columns
    # present on the same rows share one weighted design in fit_jumps; a column with missing
    # values gets its own group.
    df = integer_design.copy()
    rng = np.random.default_rng(5)
    df["z"] = 0.3 * df.x + rng.normal(0, 2, len(df))
    df["v"] = np.where(rng.random(len(df)) < 0.1, np.nan, df.y - df.d)
    st = binned(df, "x", ["d", "y", "z", "v"], ["d"])
    groups = side_data_many(st, ["y", "v", "z"], 5.0)
    assert [names for names, _ in groups] == [["y", "z"], ["v"]]
    for names, data in groups:
        for name, fit in zip(names, fit_jumps(data, 5.0, 23.5)):
            ok = df[name].notna().to_numpy()
            ref = rowlevel(df.x.to_numpy()[ok], df[name].to_numpy()[ok], 5.0, 23.5, "triangular", 1)
            assert_allclose(fit.jump, ref.params[1], rtol=1e-9)
            assert_allclose(fit.se, ref.bse[1], rtol=1e-9)
            # The batched fit is the single-column fit, to the last bit (same operations).
            one = fit_jump(st, name, 5.0, 23.5)
            assert (fit.jump, fit.se, fit.p_value) == (one.jump, one.se, one.p_value)


def test_fixed_width_bins_close_to_rowlevel():
    # Reference: statsmodels WLS HC1 on the raw continuous rows; fine fixed-width bins within 1%.
    rng = np.random.default_rng(3)
    n = 40000
    x = rng.uniform(-1, 1, n)
    y = 0.5 + 0.8 * x + 0.3 * (x >= 0) + rng.normal(0, 0.5, n)
    df = pd.DataFrame({"x": x, "y": y})
    st = binned(df, "x", ["y"])
    assert st.kind == "width"
    ref = rowlevel(x, y, 0.0, 0.3, "triangular", 1)
    fit = fit_jump(st, "y", 0.0, 0.3)
    assert abs(fit.se / ref.bse[1] - 1) < 0.01
    assert abs(fit.jump - ref.params[1]) < 0.1 * ref.bse[1]


def test_fuzzy_equals_numpy_2sls(integer_design):
    # Reference: just-identified weighted 2SLS (numpy), controls (1, x, D·x), endogenous d,
    # instrument D, HC1 sandwich (n/(n−4)) on the same kernel-weighted rows.
    df = integer_design
    st = binned(df, "x", ["d", "y"], ["d"], [("d", "y")])
    x, d, y = df.x.to_numpy(), df.d.to_numpy(), df.y.to_numpy()
    for h in (12.0, 30.0):
        w = np.clip(1 - np.abs(x) / h, 0, None)
        m = w > 0
        D = (x >= 0).astype(float)
        Z = np.column_stack([np.ones_like(x), D, x, D * x])[m]
        X = np.column_stack([np.ones_like(x), d, x, D * x])[m]
        W = w[m]
        ZW = Z.T * W
        beta = np.linalg.solve(ZW @ X, ZW @ y[m])
        e = y[m] - X @ beta
        B = np.linalg.inv(ZW @ X)
        meat = (Z * (W ** 2 * e ** 2)[:, None]).T @ Z
        V = B @ meat @ B.T * m.sum() / (m.sum() - 4)
        fit = fit_fuzzy(st, "d", "y", 0.0, h)
        assert_allclose(fit.effect, beta[1], rtol=1e-9)
        assert_allclose(fit.se, np.sqrt(V[1, 1]), rtol=1e-9)


def test_left_closed_cutoff_moves_the_cutoff_row(integer_design):
    # Rows at x == c go left when right_closed=False: same as the row-level fit with D = 1{x > c}.
    df = integer_design
    st = binned(df, "x", ["y"])
    x, y = df.x.to_numpy(), df.y.to_numpy()
    u = x - 0.0
    w = np.clip(1 - np.abs(u) / 15, 0, None)
    m = w > 0
    D = (u > 0).astype(float)
    Z = np.column_stack([np.ones_like(u), D, u, D * u])[m]
    ref = sm.WLS(y[m], Z, weights=w[m]).fit(cov_type="HC1")
    fit = fit_jump(st, "y", 0.0, 15, right_closed=False)
    assert_allclose(fit.jump, ref.params[1], rtol=1e-9)
    assert_allclose(fit.se, ref.bse[1], rtol=1e-9)


def test_not_estimable_is_a_value(integer_design):
    st = binned(integer_design, "x", ["y"])
    fit = fit_jump(st, "y", 100.0, 5.0)
    assert np.isnan(fit.jump) and "no data" in fit.reason
