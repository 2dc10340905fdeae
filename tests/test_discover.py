"""Discovery search (scanner.discover): grid fits, null simulation, location, split, q-values."""
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import stats as sps
from statsmodels.stats.multitest import multipletests

from scanner.bins import BinnedStats
from scanner.breaks import search_pair
from scanner.discover import (BiasBound, bias_bound, null_sup, scan_grid, scan_grid_points,
                              _covariance)
from scanner.locate import lr_critical
from scanner.engines import BinPlan, bin_table
from scanner.io import open_table
from scanner.score import finalize

from .conftest import binned


def _design(seed=3, n=8000, jump=0.0, at=61.0):
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 150, n).astype(float)
    d = (rng.random(n) < 0.2 + 0.002 * x + jump * (x >= at)).astype(float)
    return pd.DataFrame({"x": x, "d": d})


def test_grid_jumps_equal_statsmodels_wls_hc1():
    # Reference: statsmodels WLS y ~ 1 + D + u + D·u with triangular weights, cov_type="HC1",
    # on the raw rows, at several grid cutoffs with one common bandwidth.
    df = _design(jump=0.2)
    st = binned(df, "x", ["d"], ["d"])
    grid = np.array([30.0, 61.0, 75.0, 110.0])
    h = 14.5
    sc = scan_grid(st, "d", grid, h)
    x, y = df.x.to_numpy(), df.d.to_numpy()
    for g, c in enumerate(grid):
        u = x - c
        w = np.clip(1 - np.abs(u) / h, 0, None)
        m = w > 0
        D = (u >= 0).astype(float)
        Z = np.column_stack([np.ones_like(u), D, u, D * u])[m]
        ref = sm.WLS(y[m], Z, weights=w[m]).fit(cov_type="HC1")
        assert_allclose(sc.jump[g], ref.params[1], rtol=1e-9)
        assert_allclose(sc.se[g], ref.bse[1], rtol=1e-9)


def test_grid_is_support_for_coarse_and_quantiles_for_continuous():
    st = binned(_design(), "x", ["d"], ["d"])
    grid, kind = scan_grid_points(st, "d")
    assert kind == "support" and np.all(grid == np.round(grid))
    rng = np.random.default_rng(1)
    df = pd.DataFrame({"x": rng.normal(0, 1, 30000), "d": (rng.random(30000) < 0.3).astype(float)})
    st2 = binned(df, "x", ["d"], ["d"])
    grid2, kind2 = scan_grid_points(st2, "d")
    assert kind2 == "quantile" and 400 <= grid2.size <= 500
    # Snapped to bin edges of the fixed-width grid.
    k = (grid2 - st2.origin) / st2.width
    assert_allclose(k, np.round(k), atol=1e-6)


def _independent_scan(k=8, rows=400, seed=0):
    """Grid points farther apart than 2h: their jumps share no rows (independent)."""
    rng = np.random.default_rng(seed)
    x = np.repeat(np.arange(0, 40 * k, 1.0), rows)
    d = (rng.random(x.size) < 0.3).astype(float)
    st = binned(pd.DataFrame({"x": x, "d": d}), "x", ["d"], ["d"])
    grid = np.arange(20.0, 40 * k - 20, 40.0)
    return scan_grid(st, "d", grid, bandwidth=8.0)


def test_null_critical_value_for_independent_points_is_sidak():
    # Reference: for k independent standard normals, P(max |Z| ≤ c) = (2Φ(c) − 1)^k, so the
    # 95% critical value is Φ^{-1}(1 − (1 − 0.95^{1/k})/2) (Šidák; scipy.stats.norm).
    sc = _independent_scan()
    k = int(sc.valid.sum())
    C = _covariance(sc, np.flatnonzero(sc.valid))
    R = C / np.sqrt(np.outer(np.diag(C), np.diag(C)))
    assert_allclose(R, np.eye(k), atol=1e-12)
    null = null_sup(sc, draws=20000, seed=1)
    sidak = sps.norm.ppf(1 - (1 - 0.95 ** (1 / k)) / 2)
    assert_allclose(null.critical(0.05), sidak, atol=0.05)  # simulation error of a 95% quantile


def _bins_of(xv, n, s1):
    B = xv.size
    return BinnedStats("x", ("d",), "exact", np.nan, np.nan, xv, np.full(B, -1, np.int32),
                       np.full(B, -1, np.int8), n.astype(np.int64), n * xv, n * xv * xv,
                       n[:, None].astype(np.int64), s1[:, None], s1[:, None])


def test_null_covariance_matches_monte_carlo():
    # Reference: Monte Carlo covariance (numpy.cov over 3000 simulated registries with constant
    # uptake 0.3) of the grid jumps against Σ_b ℓ_gb ℓ_g'b n_b σ²_b estimated from one registry.
    rng = np.random.default_rng(5)
    xv = np.arange(0, 60, 1.0)
    n = np.full(xv.size, 150)
    grid = np.array([20.0, 22.0, 25.0, 30.0])
    jumps = [scan_grid(_bins_of(xv, n, rng.binomial(n, 0.3).astype(float)), "d", grid, 9.0,
                       loadings=False).jump for _ in range(3000)]
    mc = np.cov(np.array(jumps).T)
    sc = scan_grid(_bins_of(xv, n, rng.binomial(n, 0.3).astype(float)), "d", grid, 9.0)
    C = _covariance(sc, np.arange(4))
    # 4 Monte Carlo standard errors (≈ 3e-5 each) plus the variance estimate's own noise.
    assert_allclose(C, mc, atol=2e-4)
    assert_allclose(np.diag(C), np.diag(mc), rtol=0.1)


def test_cells_approximate_the_exact_covariance():
    rng = np.random.default_rng(2)
    B = 6000
    x = np.sort(rng.uniform(0, 1, B))
    n = rng.poisson(8, B) + 1
    st = _bins_of(x, n, rng.binomial(n, 0.2 + 0.4 * x).astype(float))
    sc = scan_grid(st, "d", np.linspace(0.1, 0.9, 200), 0.08)
    ok = np.flatnonzero(sc.valid)
    exact = _covariance(sc, ok, cells_per_h=10 ** 6)     # no pooling
    cells = _covariance(sc, ok)
    r = lambda C: C / np.sqrt(np.outer(np.diag(C), np.diag(C)))
    assert_allclose(r(cells), r(exact), atol=0.01)


def test_lr_critical_value():
    # Hansen (2000, Econometrica 68(3)) 95% value 7.35 (from memory); formula −2 ln(1 − √0.95).
    assert_allclose(lr_critical(0.05), 7.35, atol=0.005)


def test_search_finds_a_planted_break_and_its_location():
    st = binned(_design(seed=4, n=30000, jump=0.25, at=61.0), "x", ["d"], ["d"])
    ps = search_pair(st, "d", seed=1)
    assert ps.search_p < 0.001 and ps.peaks
    pk = ps.peaks[0]
    assert abs(pk.location - 61.0) <= ps.bandwidth / 4
    assert pk.ci_low <= 61.0 <= pk.ci_high


def test_sharp_rule_gives_an_infinite_t_and_is_found():
    x = np.repeat(np.arange(0, 100, 1.0), 50)
    d = (x < 37).astype(float)
    ps = search_pair(binned(pd.DataFrame({"x": x, "d": d}), "x", ["d"], ["d"]), "d")
    assert ps.peaks and ps.peaks[0].location == 37.0 and ps.search_p == 0.0


def test_bias_bound_zero_bias_p_value_is_normal_and_line_has_no_curvature():
    # With b = 0 the bias-aware p-value is the two-sided normal p-value (scipy.stats.norm).
    assert_allclose(BiasBound(0.0, 0.0, 1.0).p_value(0.1, 0.05), 2 * sps.norm.sf(2.0), rtol=1e-12)
    x = np.repeat(np.arange(0, 100, 1.0), 30)
    df = pd.DataFrame({"x": x, "d": 0.1 + 0.004 * x})          # exactly linear "uptake"
    bb = bias_bound(binned(df, "x", ["d"]), "d", 50.0, 10.0)
    assert bb.curvature < 1e-10 and bb.bound < 1e-9
    dq = pd.DataFrame({"x": x, "d": 0.1 + 0.0001 * (x - 50) ** 2})  # μ'' = 0.0002 everywhere
    bq = bias_bound(binned(dq, "x", ["d"]), "d", 50.0, 10.0)
    assert_allclose(bq.curvature, 0.0002, rtol=1e-6)


def test_split_by_unit_hash_ignores_row_order_and_keeps_units_together():
    rng = np.random.default_rng(0)
    ids = rng.integers(0, 3000, 12000)
    df = pd.DataFrame({"pid": [f"P{i}" for i in ids], "x": rng.integers(0, 50, ids.size).astype(float),
                       "d": (rng.random(ids.size) < 0.4).astype(float)})
    plan = BinPlan(("x",), ("d",), ("d",), split_seed=7, split_unit="pid")
    a = bin_table(open_table(df), plan).stats["x"]
    b = bin_table(open_table(df.sample(frac=1.0, random_state=3).reset_index(drop=True)), plan).stats["x"]
    assert_allclose(a.n, b.n)
    assert_allclose(a.s1, b.s1)
    from scanner.engines.local import unit_halves
    import pyarrow as pa
    h = unit_halves(pa.array(df.pid), 7)
    per_unit = pd.Series(h).groupby(df.pid.to_numpy()).nunique()
    assert per_unit.max() == 1 and 0.45 < h.mean() < 0.55


def test_q_values_count_scans_without_rows():
    # Reference: statsmodels multipletests(method="fdr_bh") over the rows' p-values plus the
    # p-values of the grid scans that produced no row.
    rows = [dict(running="x", treatment="d", cutoff=float(c), origin="round", jump=0.1, se=0.02,
                 z=5.0, left=0.2, right=0.3, first_stage_f=25.0, n_left=500, n_right=500,
                 distinct_left=20, distinct_right=20, bandwidth=1.0, p_value=p)
            for c, p in ((1, 0.001), (2, 0.02), (3, 0.04))]
    extra = [0.3, 0.012]
    out = finalize(rows, 0.05, extra)
    ref = multipletests([0.001, 0.02, 0.04, 0.3, 0.012], method="fdr_bh")[1]
    got = {r["cutoff"]: r["q_value"] for r in out}
    assert_allclose([got[1.0], got[2.0], got[3.0]], ref[:3], rtol=1e-12)
    assert all(r["n_tested"] == 5 for r in out)


RULES = """
[[rule]]
id = "toy-7.5"
quantity = "score"
cutoff = 7.5
eligible = "at_or_above"
description = "Toy rule for a test."
source = "Invented for a cutscan test"
"""


def test_break_next_to_a_declared_cutoff_is_reported_on_it(tmp_path):
    rng = np.random.default_rng(8)
    n = 60000
    x = np.round(rng.uniform(0, 20, n), 1)
    d = (rng.random(n) < 0.15 + 0.01 * x + 0.3 * (x >= 8.0)).astype(np.int8)
    (tmp_path / "rules.toml").write_text(RULES)
    spec = {"running": [{"column": "x", "quantity": "score"}], "treatments": {"columns": ["d"]},
            "rules": {"catalogues": [str(tmp_path / "rules.toml")]},
            "search": {"round_numbers": False}}
    from scanner.scan import scan
    res = scan(spec, pd.DataFrame({"x": x, "d": d}))
    d = res.to_dict()
    assert [c["origin"] for c in d["candidates"]] == ["declared"]
    c = d["candidates"][0]
    assert c["cutoff"] == 7.5 and abs(c["best_fit_cutoff"] - 8.0) < 0.05
    assert any("declared at 7.5, best fit at 8" in r for r in c["reasons"])
    # Tests run: the declared cutoff, the search step whose break was attached to it, and the
    # step that found no further break (each search step is one test in the q-value family).
    assert d["n_grid_points"] > 100 and d["n_tested"] == 3
    assert [s["step"] for s in d["search"]["pairs"][0]["steps"]] == [1, 2]


# ------------------------------------------------------------------ location-set regressions
def test_location_set_stops_at_a_change_of_sign():
    # Regression: the same-sign condition bound only to the infinite-t case (A | B & C), so a
    # neighbour with a jump of the opposite sign joined the set.  Hansen (2000)'s set is for
    # one break of one direction; a sign change is another break.
    from scanner.breaks import location_set
    from scanner.discover import GridScan
    t = np.array([1.5, 3.0, -2.5, 0.4])
    g = np.array([10.0, 11.0, 12.0, 13.0])
    sc = GridScan("x", "d", g, 2.0, "support", t * 0.01, np.full(4, 0.01), t,
                  np.full(4, 100), np.full(4, 100), 800)
    assert location_set(sc, 1, 0.05) == (10.0, 11.0)


def test_grid_points_are_exact_decimal_bin_edges():
    # Regression: grid points built as origin + k·width gave 33.300000000000004 for the edge
    # 33.3, so a location set sitting on the right edge "missed" 33.3.  The edges must be the
    # engines' exact decimals (scanner/engines/grid.py: edge k is (k·p)/10^d).
    rng = np.random.default_rng(0)
    x = rng.lognormal(3.4, 0.35, 40000)
    df = pd.DataFrame({"x": x, "d": (rng.random(x.size) < 0.3).astype(float)})
    st = binned(df, "x", ["d"], ["d"])
    assert st.kind == "width"
    grid, kind = scan_grid_points(st, "d")
    assert kind == "quantile"
    dec = -int(np.floor(np.log10(st.width))) + 1
    off = [float(g) for g in grid if round(float(g), dec) != float(g)]
    assert not off, off[:5]
