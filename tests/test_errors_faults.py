"""Failures stay local, results are deterministic, outputs are safe, duplicated units are handled.

Invented tables throughout (simulated uptake jumps); the reference for keep = "first" is a
direct per-unit minimum computed with pandas groupby/idxmin, independent of the scan's code.
"""
import json
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal

from scanner.cli import main
from scanner.scan import scan
from tests.conftest import run_cli

RULES = """\
[[rule]]
id = "inside"
quantity = "score"
cutoff = 50
eligible = "at_or_above"
source = "invented for a test"

[[rule]]
id = "beyond"
quantity = "score"
cutoff = 500
eligible = "at_or_above"
source = "invented for a test: cutoff beyond the data"

[[rule]]
id = "edge"
quantity = "score"
cutoff = 1
eligible = "at_or_above"
source = "invented for a test: one distinct value on the left"
"""


def frame(n=3000, seed=9, units=None):
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 100, n)
    df = pd.DataFrame({"score": x.astype(float),
                       "treated": (rng.random(n) < 0.15 + 0.6 * (x >= 50)).astype(int),
                       "age": rng.normal(50, 10, n).round(2),
                       "visit": (pd.Timestamp("2019-01-01")
                                 + pd.to_timedelta(rng.integers(0, 1000, n), "D")).strftime("%Y-%m-%d")})
    if units:
        df.insert(0, "person_id", [f"VM-{u:06d}" for u in rng.integers(0, units, n)])
    return df


def write(tmp, df, data="", rules=True, name="data.csv"):
    df.to_csv(tmp / name, index=False)
    (tmp / "rules.toml").write_text(RULES)
    spec = tmp / "spec.toml"
    spec.write_text(f'[data]\nsource = "{name}"\ndate = "visit"\n{data}\n'
                    '[[running]]\ncolumn = "score"\nquantity = "score"\n'
                    '[treatments]\ncolumns = ["treated"]\n[covariates]\ncolumns = ["age"]\n'
                    + ('[rules]\ncatalogues = ["rules.toml"]\n' if rules else ""))
    return spec


# ---------------------------------------------------------------------- not estimable
def test_candidates_that_cannot_be_estimated_become_rows(tmp_path):
    res = scan(write(tmp_path, frame()))
    rows = {r["rule_id"]: r for r in res.rows if r["rule_id"]}
    assert rows["inside"]["verdict"] != "not estimable"
    assert np.isfinite(rows["inside"]["jump"])
    one_sided = rows["beyond"]
    assert one_sided["verdict"] == "not estimable" and np.isnan(one_sided["jump"])
    assert "no data on the right of the cutoff" in one_sided["reason"]
    few = rows["edge"]
    assert few["verdict"] == "not estimable"
    assert "fewer than 2 distinct values on a side" in few["reason"]
    assert any(r.startswith("could not be estimated") for r in few["reasons"])


def test_singular_fit_is_a_row_with_a_reason():
    """Spacings of 1e-200 underflow the normal equations: the estimator reports a singular fit."""
    from scanner.estimate import fit_jump
    from tests.conftest import binned
    x = np.r_[np.arange(-5, 0), np.arange(0, 5)] * 1e-200
    df = pd.DataFrame({"x": np.repeat(x, 20), "d": np.tile([0.0, 1.0], 100)})
    with np.errstate(all="ignore"):
        fit = fit_jump(binned(df, "x", ["d"], ["d"]), "d", 0.0, 6e-200)
    assert np.isnan(fit.jump) and fit.reason == "singular local fit"


def test_scan_goes_on_after_a_nan_fit_and_names_a_reason(tmp_path):
    df = frame()
    df["score"] = (df["score"] - 50) * 1e-200
    spec = tmp_path / "s.toml"
    df.to_parquet(tmp_path / "d.parquet")
    spec.write_text('[data]\nsource = "d.parquet"\n[[running]]\ncolumn = "score"\n'
                    '[treatments]\ncolumns = ["treated"]\n')
    with np.errstate(all="ignore"):
        res = scan(spec)
    assert res.rows, "the scan should still produce candidate rows"
    for r in res.rows:
        if r["verdict"] == "not estimable":
            assert r["reason"], r


# ---------------------------------------------------------------------- determinism
def _strip_created(path):
    d = json.loads(Path(path).read_text())
    assert d.pop("created")
    return d


def test_same_input_same_bytes_apart_from_created(tmp_path):
    spec = write(tmp_path, frame(units=2000), data='unit = "person_id"\nkeep = "first"\nmissing = [999]')
    for k in (1, 2):
        assert main(["scan", str(spec), "--out", str(tmp_path / f"o{k}"), "--quiet"]) == 0
    a = (tmp_path / "o1" / "results.json").read_bytes().splitlines()
    b = (tmp_path / "o2" / "results.json").read_bytes().splitlines()
    diff = [(x, y) for x, y in zip(a, b) if x != y]
    assert len(a) == len(b)
    assert all(x.strip().startswith(b'"created"') for x, _ in diff), diff[:3]
    assert len(diff) <= 1
    assert (tmp_path / "o1" / "candidates.csv").read_bytes() == (tmp_path / "o2" / "candidates.csv").read_bytes()


def test_determinism_across_processes_and_batch_order(tmp_path):
    """A fresh interpreter (different hash seeds) gives the same results.json body."""
    spec = write(tmp_path, frame())
    p1 = run_cli("scan", spec, "--out", tmp_path / "p1", "--quiet", cwd=tmp_path)
    env_before = os.environ.get("PYTHONHASHSEED")
    os.environ["PYTHONHASHSEED"] = "123"
    try:
        p2 = run_cli("scan", spec, "--out", tmp_path / "p2", "--quiet", cwd=tmp_path)
    finally:
        if env_before is None:
            os.environ.pop("PYTHONHASHSEED")
        else:
            os.environ["PYTHONHASHSEED"] = env_before
    assert p1.returncode == p2.returncode == 0, p1.stderr + p2.stderr
    assert _strip_created(tmp_path / "p1" / "results.json") == _strip_created(tmp_path / "p2" / "results.json")


# ---------------------------------------------------------------------- safety
def test_spec_is_data_only(tmp_path):
    """A spec value that looks like code stays text: it names a (missing) file, nothing runs."""
    marker = tmp_path / "pwned"
    spec = write(tmp_path, frame())
    text = spec.read_text().replace('"data.csv"', f'"__import__(\'os\').system(\'touch {marker}\')"')
    spec.write_text(text)
    assert main(["scan", str(spec), "--out", str(tmp_path / "o"), "--quiet"]) == 2
    assert not marker.exists()


def test_paths_resolve_relative_to_the_spec_file(tmp_path):
    sub = tmp_path / "project"
    sub.mkdir()
    spec = write(sub, frame())
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    p = run_cli("scan", spec, "--out", "out", "--quiet", cwd=elsewhere)
    assert p.returncode == 0, p.stderr
    assert (elsewhere / "out" / "results.json").exists()


def test_outputs_hold_aggregates_only(tmp_path):
    """No identifier value and no row-level covariate value appears in any output file."""
    df = frame(units=2500)
    rng = np.random.default_rng(4)
    df["age"] = rng.normal(50, 10, len(df)) + rng.random(len(df)) * 1e-6   # every value unique
    spec = write(tmp_path, df)
    assert main(["scan", str(spec), "--out", str(tmp_path / "o"), "--quiet"]) == 0
    blob = "".join((tmp_path / "o" / f).read_text() for f in ("results.json", "candidates.csv", "report.html"))
    for pid in df["person_id"].unique()[:300]:
        assert pid not in blob
    for v in df["age"].to_numpy()[:300]:
        assert repr(float(v)) not in blob and f"{v:.10g}" not in blob


def test_small_cells_are_suppressed(tmp_path):
    """Counts 1..10 never appear (US CMS cell-size suppression policy: no cells of 1 to 10)."""
    df = frame(n=400)
    spec = write(tmp_path, df)
    res = json.loads(_run_ok(spec, tmp_path / "o"))
    for c in res["candidates"]:
        for f in ("n_left", "n_right"):
            assert c[f] is None or c[f] == 0 or c[f] >= 11
    for d in res["data"]["dropped"]:
        assert d["rows"] is None or d["rows"] >= 11


def _run_ok(spec, out):
    assert main(["scan", str(spec), "--out", str(out), "--quiet"]) == 0
    return (Path(out) / "results.json").read_text()


# ---------------------------------------------------------------------- --force
def test_force_is_needed_and_replaces_whole_folder(tmp_path, capsys):
    spec = write(tmp_path, frame())
    out = tmp_path / "o"
    assert main(["scan", str(spec), "--out", str(out), "--quiet"]) == 0
    (out / "stale.txt").write_text("from an older run")
    assert main(["scan", str(spec), "--out", str(out), "--quiet"]) == 2
    assert "add --force" in capsys.readouterr().err
    assert main(["scan", str(spec), "--out", str(out), "--quiet", "--force"]) == 0
    assert sorted(p.name for p in out.iterdir()) == [".figures", "bins.csv", "candidates.csv",
                                                     "report.html", "results.json", "results.md"]
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


# ---------------------------------------------------------------------- duplicated units
def reference_first(df):
    """Earliest row per unit, ties by file order, missing dates last (pandas idxmin, by hand)."""
    d = df.dropna(subset=["person_id"]).copy()
    d["when"] = pd.to_datetime(d["visit"])
    d["when"] = d["when"].fillna(pd.Timestamp.max)
    idx = d.groupby("person_id", sort=False)["when"].idxmin()
    return df.loc[sorted(idx)]


def test_keep_first_enters_each_unit_once_by_earliest_date(tmp_path):
    df = frame(n=2000, units=600)
    df.loc[df.sample(50, random_state=1).index, "visit"] = ""           # missing dates sort last
    df.loc[df.sample(15, random_state=2).index, "person_id"] = np.nan   # no unit: dropped, counted
    dup = df.iloc[[5, 6]].copy()
    dup["visit"] = df.loc[5, "visit"]                                   # a tie on the earliest date
    df = pd.concat([df, dup], ignore_index=True)
    got = scan(write(tmp_path, df, data='unit = "person_id"\nkeep = "first"'))
    ref_df = reference_first(df)
    ref = scan(write(tmp_path / "ref" if (tmp_path / "ref").mkdir() is None else None, ref_df))
    # pooled: the held-out split is keyed by unit in one scan and by row in the other
    sa, sb = got.stats["score"].pooled(), ref.stats["score"].pooled()
    assert_array_equal(sa.n, sb.n)
    assert_array_equal(sa.key, sb.key)
    np.testing.assert_allclose(sa.s1, sb.s1, rtol=1e-12)
    assert got.data["rows_used"] == len(ref_df) == df["person_id"].nunique()
    reasons = {d["reason"]: d["rows"] for d in got.data["dropped"]}
    assert reasons["unit missing (keep = first)"] == 15
    assert reasons["repeat rows of a unit (keep = first)"] == len(df) - 15 - len(ref_df)
    assert got.data["rows_read"] == len(df)
    assert not any(n.startswith("warning:") for n in got.notes)


def test_keep_first_keeps_identifiers_as_text(tmp_path):
    """'007' and '7' are different people: the unit column is read as text from CSV."""
    df = pd.DataFrame({"person_id": ["007", "7"] * 300, "score": np.arange(600) % 100,
                       "treated": (np.arange(600) % 100 >= 50).astype(int), "age": 1.0,
                       "visit": "2020-01-01"})
    got = scan(write(tmp_path, df, data='unit = "person_id"\nkeep = "first"', rules=False))
    assert got.data["rows_used"] == 2


def test_repeated_units_warn_without_keep_first(tmp_path):
    spec = write(tmp_path, frame(units=500))
    p = run_cli("scan", spec, "--out", tmp_path / "o", "--quiet")
    assert p.returncode == 0
    assert ("cutscan: warning [repeated_units]: column 'person_id' is named like a unit "
            "identifier" in p.stderr)
    warnings = json.loads((tmp_path / "o" / "results.json").read_text())["warnings"]
    rep = [w for w in warnings if w["kind"] == "repeated_units"]
    assert rep[0]["column"] == "person_id" and 'data.keep = "first"' in rep[0]["message"]
    declared = write(tmp_path, frame(units=500), data='unit = "person_id"')
    res = scan(declared)
    msg = [w["message"] for w in res.warnings if w["kind"] == "repeated_units"]
    # the advice never repeats what the spec already says
    assert len(msg) == 1 and "is data.unit and repeats" in msg[0] and "data.unit =" not in msg[0]
    first = write(tmp_path, frame(units=500), data='unit = "person_id"\nkeep = "first"')
    assert [w for w in scan(first).warnings if w["kind"] == "repeated_units"] == []


def test_repeated_units_found_by_repetition_not_name(tmp_path):
    """An identifier named like nothing in particular is found by its repetition pattern; a
    clinic code (few values, many rows each) is not an identifier."""
    df = frame(n=800)
    df.insert(0, "clinic_id", [f"C{i % 5}" for i in range(len(df))])
    df.insert(0, "ref", [f"R{i % 400:04d}" for i in range(len(df))])
    res = scan(write(tmp_path, df))
    rep = [w for w in res.warnings if w["kind"] == "repeated_units"]
    assert [w["column"] for w in rep] == ["ref"] and rep[0]["count"] == 400
    assert "if it identifies persons" in rep[0]["message"]
    df = frame(n=800)
    df.insert(0, "clinic_id", [f"C{i % 5}" for i in range(len(df))])
    assert [w for w in scan(write(tmp_path, df)).warnings if w["kind"] == "repeated_units"] == []


def test_no_warning_when_units_are_unique(tmp_path):
    df = frame(n=800)
    df.insert(0, "person_id", [f"VM-{i}" for i in range(len(df))])
    res = scan(write(tmp_path, df))
    assert not any(n.startswith("warning:") for n in res.notes)
    assert not [w for w in res.warnings if w["kind"] == "repeated_units"]
