"""Period jumps, difference-in-discontinuities and the location grid, from period-keyed bins."""
import datetime as dt
import importlib.util

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from scanner.estimate.kernels import KERNELS
from scanner.locate import locate
from scanner.scan import scan
from scanner.timeline import (choose_granularity, diff_in_disc, period_jumps, quarter_code,
                              split_codes)

from .conftest import ROOT, binned

spec_ = importlib.util.spec_from_file_location("bench_timeline", ROOT / "benchmarks" / "bench_timeline.py")
bench = importlib.util.module_from_spec(spec_)
spec_.loader.exec_module(bench)


@pytest.fixture
def dated():
    """Integer running variable, visits over 2019–2022, jump 0.4 only from 2021-02-15 (invented)."""
    rng = np.random.default_rng(5)
    n = 8000
    x = rng.integers(-30, 31, n).astype(float)
    date = np.datetime64("2019-01-01") + rng.integers(0, 4 * 365, n).astype("timedelta64[D]")
    post = date >= np.datetime64("2021-02-15")
    d = (rng.random(n) < 0.15 + 0.004 * x + 0.4 * (post & (x >= 0))).astype(float)
    return pd.DataFrame({"x": x, "d": d, "date": date})


def _quarters(dates):
    ts = pd.to_datetime(pd.Series(dates)).dt
    return (ts.year * 4 + ts.quarter - 1).to_numpy()


def test_diff_in_disc_equals_statsmodels_interacted_wls_hc1(dated):
    # Reference: statsmodels WLS of y ~ (1 + S + x + S·x) × (1 + T) with triangular kernel weights
    # and cov_type="HC1" on the rows (the Grembi–Nannicini–Troiano 2016 regression); the
    # mixed quarter 2021Q1 is left out, as diff_in_disc documents.
    h, c = 12.0, 0.0
    st = binned(dated, "x", ["d"], ["d"], date="date")
    res = diff_in_disc(st, "d", c, h, dt.date(2021, 2, 15))
    assert res.left_out == "2021Q1"
    q = _quarters(dated["date"])
    keep = q != quarter_code(dt.date(2021, 2, 15))
    u = dated["x"].to_numpy()[keep] - c
    y = dated["d"].to_numpy()[keep]
    T = (q[keep] > quarter_code(dt.date(2021, 2, 15))).astype(float)
    w = KERNELS["triangular"](u / h)
    m = w > 0
    S = (u >= 0).astype(float)
    Z = np.column_stack([np.ones_like(u), S, u, S * u, T, T * S, T * u, T * S * u])[m]
    fit = sm.WLS(y[m], Z, weights=w[m]).fit(cov_type="HC1")
    assert_allclose(res.did, fit.params[5], rtol=1e-9)
    assert_allclose(res.did_se, fit.bse[5], rtol=1e-9)
    assert_allclose(res.jump_before, fit.params[1], rtol=1e-9)
    assert res.n_before + res.n_after == m.sum()


def test_period_jumps_equal_rowlevel_fits_per_year(dated):
    # Reference: statsmodels WLS y ~ 1 + D + x + D·x (HC1) on the rows of each calendar year.
    h = 10.0
    st = binned(dated, "x", ["d"], ["d"], date="date")
    years = period_jumps(st, "d", 0.0, h, "year")
    assert [p.period for p in years] == ["2019", "2020", "2021", "2022"]
    yr = pd.to_datetime(dated["date"]).dt.year.to_numpy()
    for p in years:
        sub = dated[yr == int(p.period)]
        u = sub["x"].to_numpy()
        w = KERNELS["triangular"](u / h)
        m = w > 0
        D = (u >= 0).astype(float)
        Z = np.column_stack([np.ones_like(u), D, u, D * u])[m]
        fit = sm.WLS(sub["d"].to_numpy()[m], Z, weights=w[m]).fit(cov_type="HC1")
        assert_allclose([p.jump, p.se], [fit.params[1], fit.bse[1]], rtol=1e-9)


def test_split_codes_and_granularity(dated):
    st = binned(dated, "x", ["d"], ["d"], date="date")
    before, after, mixed = split_codes(st, dt.date(2021, 1, 1))
    assert mixed is None and min(after) == quarter_code(dt.date(2021, 1, 1)) == max(before) + 1
    # 8000 rows over 16 quarters: about 125 rows per side in c ± 5 — below MIN_PERIOD_ROWS
    assert choose_granularity(st, "d", 0.0, 5.0) == "year"
    assert choose_granularity(st, "d", 0.0, 30.0) == "quarter"


def test_locate_finds_an_offset_line():
    # invented design: the line is at 4 although the rule says 0
    rng = np.random.default_rng(9)
    x = rng.integers(-30, 31, 20000).astype(float)
    d = (rng.random(x.size) < 0.2 + 0.005 * x + 0.3 * (x >= 4)).astype(float)
    st = binned(pd.DataFrame({"x": x, "d": d}), "x", ["d"], ["d"])
    loc = locate(st, "d", 0.0, 12.0, reach=8)
    assert loc.cutoff == 4 and loc.nearest_declared == 0 and loc.grid_points == 17
    assert abs(loc.t) > 10


def test_fast_simulation_adoption_midway():
    # Fast version of benchmarks/bench_timeline.py (full: 500 reps in benchmarks/results/timeline.md).
    r = bench.run_adoption(reps=60, n=8000, seed=3)
    assert abs(r["pre_mean"]) < 0.03
    assert abs(r["post_mean"] - bench.TAU) < 0.03
    assert abs(r["did_mean"] - bench.TAU) < 0.03
    assert 0.85 <= r["coverage"] <= 1.0          # nominal 0.95; tolerant bound for 60 reps
    assert 0.7 < r["se_mean"] / r["did_sd"] < 1.3   # SEs match the spread of the estimates


def test_fast_simulation_moved_cutoff_tracked():
    r = bench.run_moved(reps=20, n=8000, seed=4)
    assert r["nearest_right"] >= 0.95
    assert r["within_005"] >= 0.85


def test_scan_reports_before_after_fields(dated, tmp_path):
    cat = tmp_path / "rules.toml"
    cat.write_text('[[rule]]\nid = "late"\nquantity = "score"\ncutoff = 0\neligible = "at_or_above"\n'
                   'effective_from = 2021-02-15\nsource = "invented"\n\n[[rule]]\nid = "undated"\n'
                   'quantity = "score"\ncutoff = 10\neligible = "at_or_above"\nsource = "invented"\n')
    spec = {"data": {"date": "date"}, "running": [{"column": "x", "quantity": "score"}],
            "treatments": {"columns": ["d"]}, "rules": {"catalogues": [str(cat)]},
            "search": {"round_numbers": False}}
    res = scan(spec, dated)
    rows = {r["rule_id"]: r for r in res.rows}
    late = rows["late"]
    st = binned(dated, "x", ["d"], ["d"], date="date")
    ref = diff_in_disc(st, "d", 0.0, late["bandwidth"], dt.date(2021, 2, 15))
    assert_allclose([late["jump_before"], late["jump_after"], late["did"], late["did_se"]],
                    [ref.jump_before, ref.jump_after, ref.did, ref.did_se], rtol=1e-12)
    # No planted jump before the date, 0.4 after: judged against each period's own SE, since the
    # scan's bandwidth (and so the noise) depends on the selector.
    assert abs(late["jump_before"]) < 3 * late["se_before"]
    assert abs(late["jump_after"] - 0.4) < 3 * late["se_after"]
    assert rows["undated"]["did"] is None and "did" in rows["undated"]


def test_check_api_suppresses_small_periods_and_handles_undated_rules(dated, tmp_path):
    from scanner.check import check, render, to_dict
    from scanner.spec import parse_spec
    few = dated.copy()
    # one extra quarter (2023Q1) with only 6 rows: its counts and jump must not be shown
    extra = pd.DataFrame({"x": [-2.0, -1.0, -1.0, 0.0, 1.0, 2.0], "d": [0, 0, 1, 1, 1, 0.0],
                          "date": pd.to_datetime(["2023-02-01"] * 6)})
    few = pd.concat([few, extra], ignore_index=True)
    cat = tmp_path / "rules.toml"
    cat.write_text('[[rule]]\nid = "late"\nquantity = "score"\ncutoff = 0\neligible = "at_or_above"\n'
                   'effective_from = 2021-02-15\nsource = "invented"\n\n[[rule]]\nid = "plain"\n'
                   'quantity = "score"\ncutoff = 0\neligible = "at_or_above"\nsource = "invented"\n')
    spec = parse_spec({"data": {"date": "date"}, "running": [{"column": "x", "quantity": "score"}],
                       "treatments": {"columns": ["d"]}, "rules": {"catalogues": [str(cat)]}})
    res = check(spec, "late", data=few, granularity="quarter")[0]
    d = to_dict(res)
    last = d["periods"]["late"][-1]
    assert last["period"] == "2023Q1" and last["n_left"] is None and last["jump"] is None
    assert d["changes"][0]["left_out"] == "2021Q1"
    assert d["changes"][0]["did"] > 0.25
    plain = check(spec, "plain", data=dated)[0]
    assert plain.changes == [] and plain.granularity in ("quarter", "year")
    assert "no effective date" in str(render(plain)[1])
