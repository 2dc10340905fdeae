"""The IK (2012) bandwidth reproduces its defining formulas, step by step on raw rows.

Reference: Imbens & Kalyanaraman (2012, Review of Economic Studies 79(3)), algorithm as listed in
docs/methods.md §2 (pilot 1.84·S_X·N^(-1/5); cubic between side medians; 3.56; 2160; C_K = 3.4375
for the triangular kernel — the constants were re-derived from kernel theory, the step order is
from memory).
"""
import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from scanner.estimate import ik_bandwidth

from .conftest import binned


def ik_by_hand(x, y, c):
    N = len(x)
    u = x - c
    right = u >= 0
    h1 = 1.84 * np.std(u, ddof=1) * N ** (-1 / 5)
    l1, r1 = (~right) & (u >= -h1), right & (u <= h1)
    f = (l1.sum() + r1.sum()) / (2 * N * h1)
    s2 = (((y[l1] - y[l1].mean()) ** 2).sum() + ((y[r1] - y[r1].mean()) ** 2).sum()) / (l1.sum() + r1.sum())
    ml, mr = np.quantile(u[~right], 0.5, method="inverted_cdf"), np.quantile(u[right], 0.5, method="inverted_cdf")
    m = (u >= ml) & (u <= mr)
    X = np.column_stack([np.ones(m.sum()), right[m], u[m], u[m] ** 2, u[m] ** 3])
    g = np.linalg.lstsq(X, y[m], rcond=None)[0]
    m3 = 6 * g[4]
    out = {}
    for name, side in (("r", right), ("l", ~right)):
        h2 = 3.56 * (s2 / (f * m3 ** 2)) ** (1 / 7) * side.sum() ** (-1 / 7)
        w = side & (np.abs(u) <= h2)
        Q = np.column_stack([np.ones(w.sum()), u[w], u[w] ** 2])
        lam = np.linalg.lstsq(Q, y[w], rcond=None)[0]
        out[name] = (2 * lam[2], 2160 * s2 / (w.sum() * h2 ** 4), h2)
    h = 3.4375 * (2 * s2 / (f * ((out["r"][0] - out["l"][0]) ** 2 + out["r"][1] + out["l"][1]))) ** 0.2 * N ** -0.2
    return dict(h=h, h1=h1, f=f, s2=s2, m3=m3, h2r=out["r"][2], h2l=out["l"][2],
                m2r=out["r"][0], m2l=out["l"][0])


@pytest.fixture
def small():
    # Invented data: 400 rows on a 0.01 grid with a curved mean and a jump of 0.3.
    rng = np.random.default_rng(5)
    x = np.round(rng.uniform(-1, 1, 400), 2)
    y = 0.2 + 0.5 * x - 0.8 * x ** 2 + 0.6 * x ** 3 + 0.3 * (x >= 0) + rng.normal(0, 0.3, 400)
    return pd.DataFrame({"x": x, "y": y})


def test_ik_matches_hand_computation(small):
    st = binned(small, "x", ["y"])
    assert st.kind == "exact"
    got = ik_bandwidth(st, "y", 0.0)
    ref = ik_by_hand(small.x.to_numpy(), small.y.to_numpy(), 0.0)
    assert_allclose(got.h_pilot, ref["h1"], rtol=1e-10)
    assert_allclose(got.density, ref["f"], rtol=1e-10)
    assert_allclose(got.sigma2, ref["s2"], rtol=1e-10)
    assert_allclose(got.m3, ref["m3"], rtol=1e-8)
    assert_allclose([got.h2_right, got.h2_left], [ref["h2r"], ref["h2l"]], rtol=1e-8)
    assert_allclose([got.m2_right, got.m2_left], [ref["m2r"], ref["m2l"]], rtol=1e-8)
    assert_allclose(got.h, ref["h"], rtol=1e-8)


def test_ik_invariant_to_row_order_and_batches(small):
    st = binned(small, "x", ["y"])
    shuffled = small.sample(frac=1, random_state=1).reset_index(drop=True)
    from scanner.engines import BinPlan
    from scanner.engines.local import bin_local
    from scanner.io import open_table
    t = open_table(shuffled)
    batched = type(t)(t.name, t.columns, lambda cols, rows: t._batches(cols, 37))
    st2 = bin_local(batched, BinPlan(("x",), ("y",))).stats["x"]
    assert_allclose(ik_bandwidth(st2, "y", 0.0).h, ik_bandwidth(st, "y", 0.0).h, rtol=1e-12)


def test_ik_oracle_order_of_magnitude_cct_model1():
    # CCT (2014) Model 1 (Lee 2008 calibration; coefficients in docs/methods.md §4): the oracle
    # AMSE bandwidth at N = 500 is about 0.166 [derived]; estimates scatter around it.
    rng = np.random.default_rng(0)
    hs = []
    for _ in range(30):
        x = 2 * rng.beta(2, 4, 500) - 1
        left = 0.48 + 1.27 * x + 7.18 * x**2 + 20.21 * x**3 + 21.54 * x**4 + 7.33 * x**5
        right = 0.52 + 0.84 * x - 3.00 * x**2 + 7.99 * x**3 - 9.01 * x**4 + 3.56 * x**5
        y = np.where(x < 0, left, right) + rng.normal(0, 0.1295, 500)
        st = binned(pd.DataFrame({"x": x, "y": y}), "x", ["y"], max_exact=10_000)
        hs.append(ik_bandwidth(st, "y", 0.0).h)
    assert 0.05 < np.median(hs) < 0.5
