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
        first = -prior if prior else min(a, 0)
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
    meas.to_parquet(tmp_path / "m.parquet")
    ev.to_parquet(tmp_path / "e.parquet")
    (tmp_path / "spec.toml").write_text(
        'title = "long"\n[data]\nsource = "m.parquet"\nperson = "pid"\ndate = "on"\n'
        '[[running]]\nname = "hba1c"\ncolumn = "value"\nwhere = { test = "HBA1C" }\n'
        '[events]\nsource = "e.parquet"\ndate = "when"\ncode = "code"\n'
        '[[events.uptake]]\nname = "mtf"\ncodes = ["MTF"]\ndays = [0, 180]\n'
        '[search]\ndiscover = false\n')
    out = run_cli("scan", tmp_path / "spec.toml", "--out", tmp_path / "out")
    assert out.returncode == 0, out.stderr
    import json
    res = json.loads((tmp_path / "out" / "results.json").read_text())
    top = [c for c in res["candidates"] if c["cutoff"] == 6.5][0]
    assert top["verdict"] == "usable" and abs(top["jump"] - 0.5) < 0.1
    assert res["data"]["index_rows"] == {"hba1c": n}
