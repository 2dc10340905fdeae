"""Long-format registries: analysis rows built in DuckDB equal a plain pandas construction.

The reference below is written from the documented semantics (scanner/events/layout.py) with
pandas merges only, independently of the SQL: index row = earliest measurement per person
(lowest value on a tie day) or every measurement day; uptake = an event of the codes on days
index + a .. index + b inclusive; ``prior_days`` look-back sets the uptake missing; with observed
periods, an uptake whose days are not covered is missing and an index day outside every period
drops the row.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from scanner.events.demo_long import DATA_TABLES, EVENTS_TABLE
from scanner.events.duck import Registry
from scanner.events.layout import parse_layout
from scanner.errors import ColumnNotFoundError, SpecError

from .conftest import run_cli

DAY0 = pd.Timestamp("2016-01-01")


def registry(seed=3, n=400):
    rng = np.random.default_rng(seed)
    k = rng.integers(1, 5, n)
    pid = np.repeat(np.arange(n), k)
    day = rng.integers(0, 900, pid.size)
    day[rng.random(pid.size) < 0.15] = day[0]           # same-day repeats exist
    meas = pd.DataFrame({
        "pid": pid.astype(str), "on": DAY0 + pd.to_timedelta(day, "D"),
        "test": rng.choice(["HBA1C", "LDL"], pid.size, p=[0.7, 0.3]),
        "value": np.round(rng.normal(6.4, 0.7, pid.size), 1), "female": pid % 2})
    ne = 3 * n
    ev = pd.DataFrame({"pid": rng.integers(0, n, ne).astype(str),
                       "when": DAY0 + pd.to_timedelta(rng.integers(-400, 1200, ne), "D"),
                       "code": rng.choice(["MTF", "MTF2", "A10BA02", "X1"], ne)})
    start = rng.integers(-500, 400, n)
    periods = pd.DataFrame({"pid": np.arange(n).astype(str),
                            "start": DAY0 + pd.to_timedelta(start, "D"),
                            "end": DAY0 + pd.to_timedelta(start + rng.integers(100, 1500, n), "D")})
    return meas, ev, periods


SPEC = {"data": {"source": "m.parquet", "person": "pid", "date": "on"},
        "running": [{"name": "hba1c", "column": "value", "where": {"test": "HBA1C"}}],
        "events": {"source": "e.parquet", "date": "when", "code": "code",
                   "uptake": [{"name": "mtf", "codes": ["MTF", "A10B*"], "days": [0, 180],
                               "prior_days": 90},
                              {"name": "any_late", "codes": ["X1"], "days": [30, 365]}]}}


def reference(meas, ev, periods, index="first", observed=True):
    m = meas[meas.test == "HBA1C"].copy()
    m["day"] = (m.on - pd.Timestamp("1970-01-01")).dt.days
    m = m.sort_values(["pid", "day", "value", "female"])
    key = ["pid"] if index == "first" else ["pid", "day"]
    idx = m.drop_duplicates(key, keep="first")[["pid", "day", "value", "female"]].reset_index(drop=True)
    e = ev.copy()
    e["eday"] = (e.when - pd.Timestamp("1970-01-01")).dt.days
    p = periods.copy()
    p["s"] = (p.start - pd.Timestamp("1970-01-01")).dt.days
    p["t"] = (p.end - pd.Timestamp("1970-01-01")).dt.days
    cover = idx.reset_index().merge(p, on="pid")
    cover = cover[(cover.day >= cover.s) & (cover.day <= cover.t)].groupby("index").agg(s=("s", "min"), t=("t", "max"))
    idx = idx.join(cover)
    out = {}
    for name, is_code, (a, b), prior in (("mtf", lambda c: c.isin(["MTF"]) | c.str.startswith("A10B"), (0, 180), 90),
                                         ("any_late", lambda c: c == "X1", (30, 365), None)):
        ee = e[is_code(e.code)]
        j = idx.reset_index().merge(ee, on="pid")
        rel = j.eday - j.day
        hit = j[(rel >= a) & (rel <= b)]["index"].unique()
        pri = j[(rel >= -(prior or 0)) & (rel <= -1)]["index"].unique() if prior else []
        col = pd.Series(0.0, index=idx.index)
        col[hit] = 1.0
        # Every day the uptake looks at: its window, the look-back and the index day itself.
        looked = list(range(a, b + 1)) + (list(range(-prior, 0)) if prior else []) + [0]
        first = min(looked)
        if observed:
            seen = (idx.s <= idx.day + first) & (idx.t >= idx.day + b)
            col[~seen.fillna(False).astype(bool)] = np.nan
        col[pri] = np.nan
        out[name] = col
        out["prior_" + name] = pd.Series(idx.index.isin(pri), index=idx.index)
    res = idx.assign(**{k: v for k, v in out.items() if not k.startswith("prior_")})
    if observed:
        res = res[res.s.notna()]
    return res, out


def build(meas, ev, periods, index="first", observed=True):
    raw = {**SPEC, "running": [dict(SPEC["running"][0], index=index)]}
    if observed:
        raw = {**raw, "data": {**raw["data"], "periods": "p.parquet", "period_start": "start",
                               "period_end": "end"}}
    lay = parse_layout(raw, "<test>", ("female",))
    data = {"meas": meas, "events": ev}
    if observed:
        data["periods"] = periods
    reg = Registry(lay, __import__("pathlib").Path("."), data)
    got = pa.Table.from_batches(list(reg.batches(reg.columns, 1000))).to_pandas()
    return reg, got


@pytest.mark.parametrize("index", ["first", "each"])
@pytest.mark.parametrize("observed", [True, False])
def test_index_rows_and_windows_equal_pandas(index, observed):
    meas, ev, periods = registry()
    want, parts = reference(meas, ev, periods, index, observed)
    want_index = want.index
    reg, got = build(meas, ev, periods, index, observed)
    try:
        got = got.sort_values(["pid", "on"]).reset_index(drop=True)
        want = want.sort_values(["pid", "day"]).reset_index(drop=True)
        assert len(got) == len(want) and len(got) > 100
        assert (got.pid.to_numpy() == want.pid.to_numpy()).all()
        days = (pd.to_datetime(got.on) - pd.Timestamp("1970-01-01")).dt.days.to_numpy()
        np.testing.assert_array_equal(days, want.day.to_numpy())
        np.testing.assert_array_equal(got.hba1c.to_numpy(), want.value.to_numpy())
        np.testing.assert_array_equal(got.female.to_numpy(), want.female.to_numpy())
        for u in ("mtf", "any_late"):
            np.testing.assert_array_equal(got[u].to_numpy(dtype=float), want[u].to_numpy(dtype=float))
        # Every kind of drop happens in this design, so the counts below are not vacuous.
        dropped = {(d["treatment"], d["reason"]): d["rows"] for d in reg.dropped()}
        prior = int(parts["prior_mtf"][want_index].sum())
        assert prior > 0
        if observed:
            n_all = len(reference(meas, ev, periods, index, False)[0])
            assert dropped[(None, "window not observed")] == n_all - len(want) > 0
            assert dropped[("mtf", "treated before")] == prior
            assert dropped[("mtf", "window not observed")] == int(want.mtf.isna().sum()) - prior > 0
            assert dropped[("any_late", "window not observed")] == int(want.any_late.isna().sum()) > 0
        else:
            assert dropped == {("mtf", "treated before"): int(want.mtf.isna().sum())}
    finally:
        reg.close()


def test_periods_with_end_before_start_or_no_date_are_left_out_and_reported(tmp_path):
    # A swapped pair of period dates (end before start) and a missing end cannot be observed
    # time: the rows they alone would cover are dropped as "window not observed", exactly as
    # the pandas reference does without those period rows, and the scan says how many there
    # were (warning period_dates) instead of leaving the user to guess at sparse follow-up.
    from scanner import quality
    meas, ev, periods = registry(seed=11)
    bad = periods.copy()
    bad.loc[:29, ["start", "end"]] = bad.loc[:29, ["end", "start"]].to_numpy().copy()
    bad.loc[40:46, "end"] = pd.NaT
    bad.loc[47:48, "start"] = pd.NaT
    want, _ = reference(meas, ev, bad[(bad.end >= bad.start)], "first", True)
    reg, got = build(meas, ev, bad, "first", True)
    try:
        assert len(got) == len(want) and len(want) < len(reference(meas, ev, periods)[0])
        assert sorted(got.pid) == sorted(want.pid)
        problems = reg.period_problems()
        assert (problems["rows"], problems["undated"], problems["reversed"]) == (400, 9, 30)
    finally:
        reg.close()
    warned = quality.period_warnings(problems)
    assert [(w["kind"], w["column"], w["count"]) for w in warned] == \
        [("period_dates", None, 30), ("period_dates", None, 9)]
    assert "30 of 400" in warned[0]["message"] and "end before they start" in warned[0]["message"]
    # The scan carries them into its warnings (results.json, terminal, report).
    import scanner
    bad.to_parquet(tmp_path / "p.parquet")
    write_small(tmp_path / "spec.toml", meas, ev,
                data='periods = "p.parquet"\nperiod_start = "start"\nperiod_end = "end"\n')
    res = scanner.scan(tmp_path / "spec.toml")
    assert [(w["kind"], w["count"]) for w in res.warnings if w["kind"] == "period_dates"] == \
        [("period_dates", 30), ("period_dates", 9)]
    # Without observation periods, nothing to say.
    reg, _ = build(meas, ev, periods, "first", False)
    try:
        assert reg.period_problems() is None and quality.period_warnings(None) == []
    finally:
        reg.close()


def test_window_ends_inclusive_and_day_zero():
    """Hand-made: events on day 0, day 180 and day 181; a prior event on day −1."""
    meas = pd.DataFrame({"pid": ["a", "b", "c", "d"], "on": [DAY0] * 4, "test": "HBA1C",
                         "value": [6.0, 6.5, 7.0, 7.5], "female": 0})
    ev = pd.DataFrame({"pid": ["a", "b", "c", "d"],
                       "when": DAY0 + pd.to_timedelta([0, 180, 181, -1], "D"), "code": "MTF"})
    raw = {**SPEC, "events": {**SPEC["events"], "uptake": [SPEC["events"]["uptake"][0]]}}
    reg = Registry(parse_layout(raw, "<t>", ("female",)), __import__("pathlib").Path("."),
                   {"meas": meas, "events": ev})
    try:
        got = pa.Table.from_batches(list(reg.batches(["pid", "mtf"], 10))).to_pandas()
        mtf = got.set_index("pid").mtf.to_dict()
        assert mtf["a"] == 1.0 and mtf["b"] == 1.0 and mtf["c"] == 0.0 and np.isnan(mtf["d"])
    finally:
        reg.close()


def test_spec_errors_name_the_key():
    bad = {**SPEC, "events": {**SPEC["events"], "uptake": [{"name": "x", "codes": ["A"], "days": [10, 0]}]}}
    with pytest.raises(SpecError, match=r"days = \[10, 0\] must be \[first, last\]"):
        parse_layout(bad, "s.toml", ())
    bad = {**SPEC, "events": {**SPEC["events"], "uptake": [{"name": "x", "code": ["A"]}]}}
    with pytest.raises(SpecError, match="unknown key .*'code'.*Did you mean 'codes'|unknown key .*'code'"):
        parse_layout(bad, "s.toml", ())


def test_missing_column_is_named(tmp_path):
    meas, ev, periods = registry(n=20)
    lay = parse_layout({**SPEC, "data": {**SPEC["data"], "person": "patient"}}, "<t>", ())
    with pytest.raises(ColumnNotFoundError, match="patient"):
        Registry(lay, tmp_path, {"meas": meas, "events": ev})


def write_small(spec, meas, ev, data="", running="", tail=""):
    """Write measurements, events and a one-score, one-uptake spec (extra lines per table)."""
    meas.to_parquet(spec.parent / "m.parquet")
    ev.to_parquet(spec.parent / "e.parquet")
    spec.write_text(
        'title = "long"\n[data]\nsource = "m.parquet"\nperson = "pid"\ndate = "on"\n' + data +
        '[[running]]\nname = "hba1c"\ncolumn = "value"\nwhere = { test = "HBA1C" }\n' + running +
        '[events]\nsource = "e.parquet"\ndate = "when"\ncode = "code"\n'
        '[[events.uptake]]\nname = "mtf"\ncodes = ["MTF"]\ndays = [0, 180]\n' + tail +
        '[search]\ndiscover = false\n')


def test_scan_end_to_end_finds_planted_jump(tmp_path):
    """A planted uptake jump of 0.5 at HbA1c 6.5 % in the long layout is found and usable."""
    rng = np.random.default_rng(7)
    n = 6000
    meas = pd.DataFrame({"pid": np.arange(n).astype(str),
                         "on": DAY0 + pd.to_timedelta(rng.integers(0, 700, n), "D"), "test": "HBA1C",
                         "value": np.round(rng.normal(6.4, 0.5, n), 1), "female": rng.integers(0, 2, n)})
    p = np.where(meas.value >= 6.5, 0.6, 0.1)
    took = rng.random(n) < p
    ev = pd.DataFrame({"pid": meas.pid[took], "when": meas.on[took] + pd.to_timedelta(
        rng.integers(0, 170, took.sum()), "D"), "code": "MTF"})
    write_small(tmp_path / "spec.toml", meas, ev)
    out = run_cli("scan", tmp_path / "spec.toml", "--out", tmp_path / "out")
    assert out.returncode == 0, out.stderr
    import json
    res = json.loads((tmp_path / "out" / "results.json").read_text())
    top = [c for c in res["candidates"] if c["cutoff"] == 6.5][0]
    assert top["verdict"] == "usable" and abs(top["jump"] - 0.5) < 0.1
    assert res["data"]["index_rows"] == [{"column": "hba1c", "rows": n}]


# ---------------------------------------------------------------- demo registry, OMOP layout
OMOP_SPEC = """\
title = "omop"
[data]
omop = "omop"
[[running]]
name = "hba1c"
concept = 3004410
quantity = "hba1c"
unit = "%"
[[running]]
name = "egfr"
concept = 3049187
[[events.uptake]]
name = "metformin_180d"
concepts = [{mtf}]
days = [0, 180]
prior_days = 365
[[events.uptake]]
name = "renal_referral_180d"
concepts = [2000000101]
days = [0, 180]
[covariates]
columns = ["age", "female"]
[search]
discover = false
"""


@pytest.fixture(scope="module")
def long_demo(tmp_path_factory):
    from scanner.events.demo_long import write_long, write_omop
    folder = tmp_path_factory.mktemp("long")
    spec = write_long(folder, n_persons=20_000, discover=False)
    write_omop(folder / "omop", n_persons=20_000)
    return folder, spec


def _at(result, running, treatment, cutoff):
    rows = [r for r in result.rows if r["running"] == running and r["treatment"] == treatment
            and abs(r["cutoff"] - cutoff) < 1e-9]
    assert rows, f"no candidate {running} × {treatment} at {cutoff}"
    return rows[0]


def test_planted_jumps_found_in_long_and_omop_layouts(long_demo):
    """Planted (scanner/events/demo_long.py): metformin 0.10 → 0.50 at HbA1c ≥ 6.5; renal
    referral 0.75 → 0.05 crossing eGFR 30 upwards.  Both layouts hold the same registry, so the
    index rows and the jumps agree to rounding."""
    import scanner
    folder, spec = long_demo
    long = scanner.scan(spec)
    (folder / "omop_spec.toml").write_text(OMOP_SPEC.format(mtf=1503297))
    omop = scanner.scan(folder / "omop_spec.toml")
    for res in (long, omop):
        m = _at(res, "hba1c", "metformin_180d", 6.5)
        r = _at(res, "egfr", "renal_referral_180d", 30)
        assert m["verdict"] == "usable" and abs(m["jump"] - 0.40) < 0.08, m["jump"]
        assert r["verdict"] == "usable" and abs(r["jump"] + 0.70) < 0.08, r["jump"]
        assert not any(x["verdict"] == "usable" for x in res.rows
                       if (x["running"], x["treatment"]) in {("hba1c", "renal_referral_180d"),
                                                             ("egfr", "metformin_180d")})
    for run, tr, c in (("hba1c", "metformin_180d", 6.5), ("egfr", "renal_referral_180d", 30)):
        a, b = _at(long, run, tr, c), _at(omop, run, tr, c)
        assert a["n_left"] == b["n_left"] and a["n_right"] == b["n_right"]
        np.testing.assert_allclose(a["jump"], b["jump"], rtol=0, atol=1e-9)
    assert long.data["index_rows"][:2] == omop.data["index_rows"]
    drops = {(d["column"], d["treatment"], d["reason"]): d["rows"] for d in omop.data["dropped"]}
    assert drops[("hba1c", "metformin_180d", "treated before")] > 0


def test_omop_concept_descendants_count(long_demo):
    """An uptake of a parent concept counts its descendants through concept_ancestor."""
    import scanner
    folder, _ = long_demo
    (folder / "omop_parent.toml").write_text(OMOP_SPEC.format(mtf=2000009000))
    (folder / "omop_child.toml").write_text(OMOP_SPEC.format(mtf=1503297))
    a, b = scanner.scan(folder / "omop_parent.toml"), scanner.scan(folder / "omop_child.toml")
    ja, jb = _at(a, "hba1c", "metformin_180d", 6.5), _at(b, "hba1c", "metformin_180d", 6.5)
    assert ja["jump"] == jb["jump"] and ja["n_right"] == jb["n_right"]
    (folder / "omop_none.toml").write_text(OMOP_SPEC.format(mtf=2000009999))
    c = scanner.scan(folder / "omop_none.toml")
    assert _at(c, "hba1c", "metformin_180d", 6.5)["verdict"] != "usable"


# ---------------------------------------------------------------- Spark SQL gives the same rows
from .test_spark import needs_spark  # noqa: E402


@needs_spark
@pytest.mark.spark
def test_spark_sql_equals_duckdb(tmp_path):
    """The same query text as Spark SQL: identical analysis rows, drop counts and BinnedStats
    (1e-9) on the same registry, with observed periods and a look-back."""
    from scanner.engines import BinPlan, bin_table
    from scanner.engines.spark import local_session
    from scanner.events.spark_sql import SparkRegistry
    from scanner.io import open_table
    meas, ev, periods = registry(seed=5, n=300)
    periods.loc[:4, ["start", "end"]] = periods.loc[:4, ["end", "start"]].to_numpy().copy()  # swapped
    periods.loc[10:12, "end"] = pd.NaT
    raw = {**SPEC, "data": {**SPEC["data"], "periods": "p.parquet", "period_start": "start",
                            "period_end": "end"}}
    lay = parse_layout(raw, "<t>", ("female",))
    for df, name in ((meas, "m"), (ev, "e"), (periods, "p")):
        df.to_parquet(tmp_path / f"{name}.parquet")
    duck = Registry(lay, tmp_path)
    spark = local_session("local[2]")
    try:
        sp = SparkRegistry(spark, lay, tmp_path)
        cols = ["pid", "on", "hba1c", "mtf", "any_late", "female"]
        a = pa.Table.from_batches(list(duck.batches(cols, 10_000))).to_pandas()
        b = sp.frame.select(*cols).toPandas()
        pd.testing.assert_frame_equal(a.reset_index(drop=True), b.reset_index(drop=True),
                                      check_dtype=False)
        assert duck.dropped() == sp.dropped() and duck.index_rows() == sp.index_rows()
        want = {"rows": 300, "undated": 3, "reversed": 5}
        assert {k: duck.period_problems()[k] for k in want} == want
        assert {k: sp.period_problems()[k] for k in want} == want
        plan = BinPlan(running=("hba1c",), columns=("mtf", "any_late", "female"),
                       treatments=("mtf", "any_late"), date="on")
        s1 = bin_table(open_table(pa.Table.from_batches(list(duck.batches(cols, 10_000)))), plan).stats["hba1c"]
        s2 = bin_table(sp.frame, plan, engine="spark").stats["hba1c"]
        from .test_engines import assert_same_stats
        assert_same_stats(s1, s2)
        # The in-engine binning SQL is portable: run as Spark SQL it gives DuckDB's bins.
        from scanner.events.bins_sql import bin_registry
        plan = BinPlan(running=("hba1c",), columns=("mtf", "any_late", "female"),
                       treatments=("mtf", "any_late"), date="on", split_seed=7, split_unit="pid",
                       edges={"hba1c": ((6.5, True),)}, max_exact=20, max_bins=10)

        def spark_query(sql):
            df = spark.sql(sql).toPandas()
            return {c: df[c].to_numpy() for c in df.columns}
        a = bin_registry(lambda q: duck.con.execute(q).fetchnumpy(), lay, plan, None, "duckdb", "analysis")
        b = bin_registry(spark_query, lay, plan, None, "spark", "_analysis")
        assert a.stats["hba1c"].kind == "width" and (a.stats["hba1c"].half >= 0).all()
        assert_same_stats(a.stats["hba1c"], b.stats["hba1c"])
        assert (a.rows_read, a.missing) == (b.rows_read, b.missing)
        sp.close()
    finally:
        duck.close()


# ---------------------------------------------------------------- registry-wide screen
SCREEN_SPEC = """\
title = "screen"
""" + DATA_TABLES + EVENTS_TABLE + """[screen]
min_persons = 2000
min_event_persons = 500
days = [0, 180]
[search]
discover = false
"""


def test_screen_pairs_every_measurement_with_every_code(tmp_path):
    """Planted pairs (scanner/events/demo_long.py) survive stage 1 and are usable; noise pairs
    are not; the q-value family counts every stage-1 test of every pair."""
    import json
    import scanner
    from scanner.events.demo_long import write_long
    write_long(tmp_path, n_persons=20_000, extra_tests=2, extra_codes=3)
    (tmp_path / "screen.toml").write_text(SCREEN_SPEC)
    res = scanner.scan(tmp_path / "screen.toml")
    s = res.search["screen"]
    kinds = {k["kind"] for k in s["measurement_kinds"]}
    codes = {c["code"] for c in s["event_codes"]}
    assert kinds == {"HBA1C", "EGFR", "LDL", "LAB000", "LAB001"}
    assert {"NM-MTF", "NM-RENAL", "RX000"} <= codes
    assert len(s["pairs"]) == len(kinds) * len(codes)
    tested = sum(p["tested"] for p in s["pairs"])
    assert tested > 10 * len(s["pairs"])
    assert res.rows[0]["n_tested"] <= tested and res.rows[0]["n_tested"] >= tested - 50
    assert _at(res, "HBA1C", "NM-MTF", 6.5)["verdict"] in ("usable", "caution", "doubtful")
    assert _at(res, "EGFR", "NM-RENAL", 30)["verdict"] in ("usable", "caution")
    planted = {("HBA1C", "NM-MTF"), ("EGFR", "NM-RENAL")}
    assert not [r for r in res.rows if (r["running"], r["treatment"]) not in planted
                and r["verdict"] == "usable"]
    res.to_json(tmp_path / "r.json")
    res.report(tmp_path / "r.html")
    page = (tmp_path / "r.html").read_text()
    assert "Screen by measurement" in page and "NM-RENAL at 30" in page
    assert json.loads((tmp_path / "r.json").read_text())["search"]["screen"]["pairs"]


def test_cli_long_demo(tmp_path):
    """`cutscan demo --long`: the planted declared rules come out usable, the written input
    holds the three long-format tables, and counts of dropped rows are reported."""
    import json
    out = run_cli("demo", "--long", "--out", tmp_path / "o", "--quiet")
    assert out.returncode == 0, out.stderr
    res = json.loads((tmp_path / "o" / "results.json").read_text())
    got = {(c["running"], c["treatment"], c["cutoff"]): c["verdict"] for c in res["candidates"]
           if c["origin"] == "declared"}
    assert got[("hba1c", "metformin_180d", 6.5)] == "usable"
    assert got[("egfr", "renal_referral_180d", 30.0)] == "usable"
    reasons = {d["reason"] for d in res["data"]["dropped"]}
    assert {"treated before", "window not observed"} <= reasons
    assert sorted(p.name for p in (tmp_path / "o" / "input").glob("*.parquet")) == [
        "dispensing.parquet", "enrolment.parquet", "lab_results.parquet"]


# ---------------------------------------------------------------- bins inside the engine
def _two_scores(n=1500, seed=5):
    """The test registry with a second, continuous running variable (LDL + uniform noise), so
    one design has exact bins and the other crosses the fine-key limit."""
    meas, ev, periods = registry(seed=seed, n=n)
    noise = np.random.default_rng(1).random(len(meas))
    meas["value"] = np.where(meas.test == "LDL", meas.value + noise, meas.value)
    raw = {**SPEC, "running": SPEC["running"] + [{"name": "ldl", "column": "value",
                                                  "where": {"test": "LDL"}}],
           "data": {**SPEC["data"], "periods": "p.parquet", "period_start": "start",
                    "period_end": "end"}}
    lay = parse_layout(raw, "<t>", ("female",))
    return meas, ev, periods, lay


BIN_PLANS = {
    "exact": {},
    "quarters": {"date": "on"},
    "years and quarters": {"date": "on", "periods": {"hba1c": "year"}},
    "power grid, forced edges": {"fine_keys": 50, "max_exact": 40, "max_bins": 30,
                                 "edges": {"ldl": ((6.55, True), (7.0, False)),
                                           "hba1c": ((6.5, True),)}},
    "user width": {"bin_width": {"hba1c": 0.3}, "edges": {"hba1c": ((6.5, True),)}},
}


@pytest.mark.parametrize("kw", list(BIN_PLANS.values()), ids=list(BIN_PLANS))
def test_bins_inside_duckdb_equal_streaming_pass(kw):
    """GROUP BY sums in DuckDB give the BinnedStats of streaming the same rows through the
    local engine (exact support, power-of-ten grid with forced edges, a user width, period
    keys): counts and keys exactly, sums to 1e-9; row accounting equal."""
    from scanner.engines import BinPlan, bin_table
    from scanner.events.bins_sql import bin_registry
    from scanner.io import open_table
    from .test_engines import assert_same_stats
    meas, ev, periods, lay = _two_scores()
    reg = Registry(lay, __import__("pathlib").Path("."), {"meas": meas, "events": ev, "periods": periods})
    try:
        plan = BinPlan(running=("hba1c", "ldl"), columns=("mtf", "any_late", "female"),
                       treatments=("mtf", "any_late"), **kw)
        keep = {}
        got = bin_registry(lambda s: reg.con.execute(s).fetchnumpy(), lay, plan, None, "duckdb",
                           "analysis", keep)
        # The drop counts taken in the same aggregate equal the registry's own query.
        from scanner.events.sql import dropped_entries
        assert dropped_entries(lay, keep["dropped_rows"]) == reg.dropped() != []
        cols = ["pid", "on", "hba1c", "ldl", "mtf", "any_late", "female"]
        want = bin_table(open_table(pa.Table.from_batches(list(reg.batches(cols, 100_000)))), plan)
        for r in ("hba1c", "ldl"):
            assert_same_stats(got.stats[r], want.stats[r])
        assert got.rows_read == want.rows_read and got.missing == want.missing
        assert got.nonfinite == want.nonfinite
        if "fine_keys" in kw:      # the continuous score went through the power-of-ten grid
            # At most max_bins grid bins; parts split off near the cutoffs come on top.
            st = got.stats["ldl"]
            assert st.kind == "width" and np.unique(np.floor(st.key)).size <= 30 < st.n_bins
    finally:
        reg.close()


def test_halves_inside_duckdb_follow_person_hash():
    """With a half-sample seed, each half's bins equal exact bins of the pandas reference rows
    of the persons whose md5('<seed>:<person>') ends in an odd (half 1) or even hex digit."""
    from scanner.engines import BinPlan
    from scanner.engines.local import exact_bins
    from scanner.events.bins_sql import bin_registry, person_half
    from .test_engines import assert_same_stats
    meas, ev, periods = registry(seed=4, n=800)
    want, _ = reference(meas, ev, periods, "first", True)
    lay = parse_layout({**SPEC, "data": {**SPEC["data"], "periods": "p.parquet",
                                         "period_start": "start", "period_end": "end"}},
                       "<t>", ("female",))
    reg = Registry(lay, __import__("pathlib").Path("."), {"meas": meas, "events": ev, "periods": periods})
    try:
        plan = BinPlan(running=("hba1c",), columns=("mtf", "any_late", "female"),
                       treatments=("mtf", "any_late"), split_seed=20261203, split_unit="pid")
        st = bin_registry(lambda s: reg.con.execute(s).fetchnumpy(), lay, plan, None, "duckdb",
                          "analysis").stats["hba1c"]
    finally:
        reg.close()
    half = np.array([person_half(p, 20261203) for p in want.pid])
    assert 0.4 < half.mean() < 0.6
    cols = {c: want[c].to_numpy(float) for c in ("mtf", "any_late", "female")}
    ref = exact_bins("hba1c", want.value.to_numpy(float), cols, half=half)
    for h in (0, 1):
        assert_same_stats(st.restrict(half=h), ref.restrict(half=h))
    assert person_half("a", 1) != person_half("a", 2) or person_half("b", 1) != person_half("b", 2)


def test_scan_bins_in_duckdb_equal_streaming_with_cleaning(tmp_path, monkeypatch):
    """A whole scan with a declared missing code (999 on a covariate) and a sentinel spike
    (999.0 HbA1c, outside the plausible range, found by the profile): the in-DuckDB bins, the
    cleaning counts and the warnings equal those of the streaming pass."""
    import scanner
    from scanner.events.duck import Registry as Reg
    from .test_engines import assert_same_stats
    meas, ev, periods = registry(seed=8, n=3000)
    rng = np.random.default_rng(2)
    meas.loc[rng.random(len(meas)) < 0.03, "value"] = 999.0
    meas["female"] = np.where(rng.random(len(meas)) < 0.05, 999, meas.female)
    write_small(tmp_path / "s.toml", meas, ev, data='missing_by_column = { female = [999] }\n',
                running='quantity = "hba1c"\nunit = "%"\n', tail='[covariates]\ncolumns = ["female"]\n')
    inside = scanner.scan(tmp_path / "s.toml")
    monkeypatch.setattr(Reg, "bin", lambda self, table, plan: None)
    stream = scanner.scan(tmp_path / "s.toml")
    assert_same_stats(inside.stats["hba1c"], stream.stats["hba1c"])
    assert inside.data == stream.data
    assert inside.warnings == stream.warnings
    kinds = {w["kind"] for w in inside.warnings}
    assert "sentinel_values" in kinds, kinds
    assert inside.data["missing_codes"][0]["values"] > 50          # the code was counted
    assert [d["rows"] for d in inside.data["dropped"] if "plausible" in d["reason"]][0] > 20


def test_stage_one_p_values_same_in_two_processes():
    """Stage 1 shared among two forked processes gives the p-values of one process, in order;
    the planted jump (0.5 uptake at 6.5) has a tiny p-value and a no-jump cutoff does not."""
    from scanner.candidates import Candidate
    from scanner.engines.local import exact_bins
    from scanner.events.screen import stage_one_ps
    from scanner.spec import parse_spec
    rng = np.random.default_rng(12)
    n = 8000
    x = np.round(rng.normal(6.4, 0.6, n), 1)
    d = (rng.random(n) < np.where(x >= 6.5, 0.6, 0.1)).astype(float)
    z = (rng.random(n) < 0.3).astype(float)
    st = exact_bins("hba1c", x, {"mtf": d, "other": z})
    spec = parse_spec({"data": {"source": "x.parquet"}, "running": [{"column": "hba1c"}],
                       "treatments": {"columns": ["mtf", "other"]}})
    cands = [Candidate("hba1c", t, c, "round") for c in (5.8, 6.0, 6.2, 6.5, 6.8, 7.0) * 4
             for t in ("mtf", "other")]
    one = stage_one_ps(cands, {"hba1c": st}, spec, workers=1)
    two = stage_one_ps(cands, {"hba1c": st}, spec, workers=2)
    np.testing.assert_array_equal(one, two)
    assert one[cands.index(Candidate("hba1c", "mtf", 6.5, "round"))] < 1e-12
    assert np.isfinite(one).all() and (one > 0.01).sum() > len(one) / 3


def _small(meas, ev, running, uptake):
    raw = {"data": {"source": "m.parquet", "person": "pid", "date": "on"}, "running": running,
           "events": {"source": "e.parquet", "date": "when", "code": "code", "uptake": uptake}}
    lay = parse_layout(raw, "<test>", ())
    reg = Registry(lay, __import__("pathlib").Path("."), {"meas": meas, "events": ev})
    try:
        return pa.Table.from_batches(list(reg.batches(reg.columns, 1000))).to_pandas()
    finally:
        reg.close()


def test_window_before_index_with_lookback_is_refused():
    # The look-back (days -5..-1) and a window from day -10 claim the same days: refused, naming
    # the uptake and both keys; without the look-back an event on day -8 is uptake.
    raw = {"data": {"source": "m.parquet", "person": "pid", "date": "on"},
           "running": [{"name": "v", "column": "value"}],
           "events": {"source": "e.parquet", "date": "when", "code": "code",
                      "uptake": [{"name": "early", "codes": ["X"], "days": [-10, 10], "prior_days": 5}]}}
    with pytest.raises(SpecError, match=r"events.uptake 'early'.*days.*prior_days"):
        parse_layout(raw, "<test>", ())
    meas = pd.DataFrame({"pid": ["1", "2", "3"], "on": [DAY0] * 3, "value": [1.0, 2.0, 3.0]})
    ev = pd.DataFrame({"pid": ["1", "2", "3"], "code": ["X"] * 3,
                       "when": DAY0 + pd.to_timedelta([-8, -11, 10], "D")})
    got = _small(meas, ev, [{"name": "v", "column": "value"}],
                 [{"name": "early", "codes": ["X"], "days": [-10, 10]}])
    rel = (ev.when - DAY0).dt.days                 # independent: event day relative to the index
    want = ev.assign(hit=((rel >= -10) & (rel <= 10)).astype(float)).set_index("pid").hit
    np.testing.assert_array_equal(got.set_index("pid").early.loc[want.index].to_numpy(), want.to_numpy())


def test_double_filter_column_keeps_every_running_variable():
    # A numeric kind column (read as DOUBLE) holding 5.0 and 7.0 must match where = {kind = 5}
    # and {kind = 7}; as text '5.0' <> '5' and every row was lost.
    rng = np.random.default_rng(11)
    n = 60
    meas = pd.DataFrame({"pid": rng.integers(0, 20, n).astype(str),
                         "on": DAY0 + pd.to_timedelta(rng.integers(0, 50, n), "D"),
                         "kind": rng.choice([5.0, 7.0, 9.0], n), "value": np.round(rng.normal(0, 1, n), 2)})
    ev = pd.DataFrame({"pid": ["0"], "when": [DAY0], "code": ["X"]})
    got = _small(meas, ev, [{"name": "a", "column": "value", "where": {"kind": 5}},
                            {"name": "b", "column": "value", "where": {"kind": 7}}],
                 [{"name": "u", "codes": ["X"], "days": [0, 10]}])
    for name, k in (("a", 5.0), ("b", 7.0)):
        m = meas[meas.kind == k].sort_values(["pid", "on", "value"]).drop_duplicates("pid")
        g = got[got[name].notna()].sort_values("pid")
        assert len(m) > 5
        assert list(g.pid) == list(m.sort_values("pid").pid)
        np.testing.assert_array_equal(g[name].to_numpy(), m.sort_values("pid").value.to_numpy())


def test_prefix_code_matches_percent_and_underscore_literally():
    meas = pd.DataFrame({"pid": ["1", "2", "3", "4"], "on": [DAY0] * 4, "value": [1.0, 2.0, 3.0, 4.0]})
    ev = pd.DataFrame({"pid": ["1", "2", "3", "4"], "when": [DAY0] * 4,
                       "code": ["A_1X", "AB1X", "A1Z", "A_1"]})
    got = _small(meas, ev, [{"name": "v", "column": "value"}],
                 [{"name": "u", "codes": ["A_1*"], "days": [0, 0]}])
    want = ev.set_index("pid").code.str.startswith("A_1").astype(float)
    np.testing.assert_array_equal(got.set_index("pid").u.loc[want.index].to_numpy(), want.to_numpy())


def test_text_in_value_column_is_an_input_error(tmp_path):
    from scanner.errors import InputError
    meas = pd.DataFrame({"pid": ["1", "2"], "on": [DAY0] * 2, "value": ["5.1", "<5"]})
    ev = pd.DataFrame({"pid": ["1"], "when": [DAY0], "code": ["X"]})
    with pytest.raises(InputError, match=r"m\.csv.*value.*<5.*missing"):
        raw = {"data": {"source": str(tmp_path / "m.csv"), "person": "pid", "date": "on"},
               "running": [{"name": "v", "column": "value"}],
               "events": {"source": str(tmp_path / "e.csv"), "date": "when", "code": "code",
                          "uptake": [{"name": "u", "codes": ["X"], "days": [0, 0]}]}}
        meas.to_csv(tmp_path / "m.csv", index=False)
        ev.to_csv(tmp_path / "e.csv", index=False)
        Registry(parse_layout(raw, "<test>", ()), tmp_path).close()


def test_text_in_value_column_exits_2_via_cli(tmp_path):
    meas = pd.DataFrame({"pid": ["1", "2", "3"], "on": [DAY0] * 3, "test": "HBA1C",
                         "value": ["6.1", "<5", "7.0"]})
    ev = pd.DataFrame({"pid": ["1"], "when": [DAY0], "code": ["MTF"]})
    write_small(tmp_path / "spec.toml", meas, ev)
    out = run_cli("scan", tmp_path / "spec.toml", "--out", tmp_path / "out")
    assert out.returncode == 2, out.stderr
    assert "m.parquet" in out.stderr and "value" in out.stderr and "Traceback" not in out.stderr


@needs_spark
@pytest.mark.spark
def test_spark_numeric_filter_and_literal_prefix(tmp_path):
    """The CASE running-variable number and the substring prefix match run as Spark SQL too."""
    from scanner.engines.spark import local_session
    from scanner.events.spark_sql import SparkRegistry
    meas = pd.DataFrame({"pid": ["1", "2", "3", "4"], "on": [DAY0] * 4,
                         "kind": [5.0, 7.0, 5.0, 7.0], "value": [1.0, 2.0, 3.0, 4.0]})
    ev = pd.DataFrame({"pid": ["1", "2", "3", "4"], "when": [DAY0] * 4,
                       "code": ["A_1X", "AB1X", "A1Z", "A_1"]})
    meas.to_parquet(tmp_path / "m.parquet")
    ev.to_parquet(tmp_path / "e.parquet")
    raw = {"data": {"source": "m.parquet", "person": "pid", "date": "on"},
           "running": [{"name": "a", "column": "value", "where": {"kind": 5}},
                       {"name": "b", "column": "value", "where": {"kind": 7}}],
           "events": {"source": "e.parquet", "date": "when", "code": "code",
                      "uptake": [{"name": "u", "codes": ["A_1*"], "days": [0, 0]}]}}
    lay = parse_layout(raw, "<t>", ())
    spark = local_session("local[2]")
    sp = SparkRegistry(spark, lay, tmp_path)
    try:
        got = sp.frame.select("pid", "a", "b", "u").toPandas().sort_values("pid")
    finally:
        sp.close()
    np.testing.assert_array_equal(got.a.to_numpy(), np.where(meas.kind == 5, meas.value, np.nan))
    np.testing.assert_array_equal(got.b.to_numpy(), np.where(meas.kind == 7, meas.value, np.nan))
    np.testing.assert_array_equal(got.u.to_numpy(dtype=float),
                                  ev.code.str.startswith("A_1").to_numpy(dtype=float))


def test_abutting_and_overlapping_periods_are_one_observed_span():
    # Enrolment held one row per stretch: each person's period cut into abutting pieces (the
    # next starts the day after one ends) plus an overlapping copy must read exactly like the
    # uncut period.  Before periods were merged, windows crossing a cut read "not observed".
    meas, ev, periods = registry(seed=5)
    pieces = []
    for r in periods.itertuples():
        s, t = r.start, r.end
        mid = s + (t - s) / 2
        mid = mid.normalize()
        pieces += [(r.pid, s, mid), (r.pid, mid + pd.Timedelta(days=1), t),
                   (r.pid, s + pd.Timedelta(days=3), mid - pd.Timedelta(days=2))]
    cut = pd.DataFrame(pieces, columns=["pid", "start", "end"])
    reg0, whole = build(meas, ev, periods, "each", True)
    reg1, split = build(meas, ev, cut, "each", True)
    try:
        a = whole.sort_values(["pid", "on"]).reset_index(drop=True)
        b = split.sort_values(["pid", "on"]).reset_index(drop=True)
        pd.testing.assert_frame_equal(a, b)
        assert reg0.dropped() == reg1.dropped()
        assert a.mtf.notna().sum() > 50
    finally:
        reg0.close()
        reg1.close()


def test_profile_reads_every_running_variable(tmp_path, monkeypatch):
    """Rows come ordered by running variable, so a profile of the first rows held only the
    first variable: a 999 spike on the second one (LDL) went unnoticed and stayed in its bins.
    Each variable now gets its share of the profile."""
    import scanner
    from scanner import quality
    monkeypatch.setattr(quality, "PROFILE_ROWS", 400)
    meas, ev, _ = registry(seed=8, n=3000)
    rng = np.random.default_rng(3)
    ldl = (meas.test == "LDL").to_numpy()
    meas.loc[ldl, "value"] = np.round(rng.normal(3.0, 0.6, ldl.sum()), 1)
    meas.loc[ldl & (rng.random(len(meas)) < 0.04), "value"] = 999.0
    write_small(tmp_path / "s.toml", meas, ev,
                tail='[[running]]\nname = "ldl"\ncolumn = "value"\nwhere = { test = "LDL" }\n')
    assert (meas.test == "HBA1C").sum() > 400          # the first variable alone fills 400 rows
    res = scanner.scan(tmp_path / "s.toml")
    spikes = [w for w in res.warnings if w["kind"] == "sentinel_values" and w["column"] == "ldl"]
    assert spikes and "999" in spikes[0]["message"]


def test_unreadable_value_names_the_file_of_the_step_that_read_it():
    # A conversion error while reading events or observed periods named the measurements file.
    meas, ev, periods = registry(seed=2, n=200)
    reg, _ = build(meas, ev, periods, "first", True)
    try:
        err = Exception("Could not convert string 'soon' to DATE")
        lay = reg.lay
        ev_msg = str(reg._unreadable(err, "evj"))
        assert ev_msg.startswith(f"{lay.events_source or 'events'}:") and lay.events_date in ev_msg
        ob_msg = str(reg._unreadable(err, "cov"))
        assert lay.period_start in ob_msg and lay.period_end in ob_msg
        me_msg = str(reg._unreadable(err, "idx"))
        assert "value" in me_msg and "must hold numbers" in me_msg
    finally:
        reg.close()


def test_unreadable_omop_date_names_the_omop_table_and_column(tmp_path):
    # End to end: a text date in the OMOP observation_period table.  The message named the
    # layout's default columns (period_start, period_end) instead of the OMOP table's own.
    import pandas as pd
    import scanner
    from scanner.errors import InputError
    from scanner.events.demo_long import write_omop
    write_omop(tmp_path / "omop", n_persons=400)
    f = tmp_path / "omop" / "observation_period.parquet"
    op = pd.read_parquet(f)
    op["observation_period_end_date"] = op["observation_period_end_date"].astype(str)
    op.loc[3, "observation_period_end_date"] = "soon"
    op.to_parquet(f)
    (tmp_path / "s.toml").write_text(OMOP_SPEC.format(mtf=1503297))
    with pytest.raises(InputError) as err:
        scanner.scan(tmp_path / "s.toml")
    msg = str(err.value)
    assert "observation_period" in msg and "observation_period_end_date" in msg
    assert "period_start and period_end" not in msg
