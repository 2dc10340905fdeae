"""Bad input: exit code 2, a one-paragraph message naming the file/column/line and the fix."""
import json

import numpy as np
import pandas as pd
import pytest

from .conftest import run_cli

SPEC = """\
title = "t"
[data]
source = "{source}"
[[running]]
column = "{running}"
quantity = "score"
[treatments]
columns = ["{treatment}"]
[rules]
catalogues = ["rules.toml"]
[search]
discover = false
"""
RULES = """\
[[rule]]
id = "r1"
quantity = "score"
cutoff = {cutoff}
eligible = "at_or_above"
source = "invented for a test"
"""


def make(tmp_path, df=None, running="score", treatment="treated", cutoff=50, spec=None, name="t.csv"):
    if df is None:
        rng = np.random.default_rng(0)
        x = rng.integers(0, 100, 3000)
        df = pd.DataFrame({"score": x, "treated": (rng.random(3000) < 0.2 + 0.5 * (x >= 50)).astype(int)})
    df.to_csv(tmp_path / name, index=False)
    (tmp_path / "rules.toml").write_text(RULES.format(cutoff=cutoff))
    p = tmp_path / "spec.toml"
    p.write_text(spec if spec is not None else SPEC.format(source=name, running=running, treatment=treatment))
    return p


def fails(proc, *phrases):
    assert proc.returncode == 2, (proc.returncode, proc.stdout, proc.stderr)
    assert "Traceback" not in proc.stderr
    assert proc.stderr.count("\n") <= 2               # one paragraph
    for ph in phrases:
        assert ph in proc.stderr, proc.stderr


def test_ok_baseline(tmp_path):
    proc = run_cli("scan", make(tmp_path), "--out", tmp_path / "o", "--quiet")
    assert proc.returncode == 0, proc.stderr
    rows = json.loads((tmp_path / "o" / "results.json").read_text())["candidates"]
    assert rows[0]["rule_id"] == "r1"


def test_missing_data_file(tmp_path):
    p = make(tmp_path)
    (tmp_path / "t.csv").unlink()
    fails(run_cli("scan", p, "--out", tmp_path / "o"), "t.csv", "file not found")


def test_missing_spec_file(tmp_path):
    fails(run_cli("scan", tmp_path / "nope.toml", "--out", tmp_path / "o"), "nope.toml", "not found")


def test_unknown_column_names_closest_match(tmp_path):
    fails(run_cli("scan", make(tmp_path, running="scroe"), "--out", tmp_path / "o"),
          "'scroe'", "Did you mean 'score'", "Available columns")


def test_non_binary_treatment_shows_values(tmp_path):
    df = pd.DataFrame({"score": np.arange(200) % 100, "treated": np.arange(200) % 3})
    fails(run_cli("scan", make(tmp_path, df), "--out", tmp_path / "o"),
          "treatment column 'treated'", "values seen: 0, 1, 2")


def test_constant_running_variable(tmp_path):
    df = pd.DataFrame({"score": np.full(300, 7.0), "treated": np.arange(300) % 2})
    fails(run_cli("scan", make(tmp_path, df), "--out", tmp_path / "o"), "'score' is constant")


def test_all_missing_running_variable(tmp_path):
    df = pd.DataFrame({"score": [np.nan] * 300, "treated": np.arange(300) % 2})
    fails(run_cli("scan", make(tmp_path, df), "--out", tmp_path / "o"), "'score'", "no usable values")


def test_text_running_variable(tmp_path):
    df = pd.DataFrame({"score": ["65", "72+"] * 100, "treated": np.arange(200) % 2})
    fails(run_cli("scan", make(tmp_path, df), "--out", tmp_path / "o"), "'score' holds text", "'72+'")


def test_too_few_rows_on_a_side_is_kept_and_flagged(tmp_path):
    rng = np.random.default_rng(1)
    x = rng.integers(0, 100, 3000)
    x[x >= 95] = 50                       # almost nothing at 97 or above
    x[:3] = [97, 98, 99]
    df = pd.DataFrame({"score": x, "treated": (x >= 97).astype(int)})
    proc = run_cli("scan", make(tmp_path, df, cutoff=97), "--out", tmp_path / "o", "--quiet")
    assert proc.returncode == 0, proc.stderr
    rows = json.loads((tmp_path / "o" / "results.json").read_text())["candidates"]
    r1 = next(r for r in rows if r["rule_id"] == "r1")
    assert r1["verdict"] in ("not estimable", "caution", "no jump", "doubtful", "inconclusive")
    assert ("thin" in r1["flags"]) or r1["verdict"] == "not estimable"
    assert r1["n_right"] is None          # 3 rows: suppressed (CMS cell-size rule, 1–10)


def test_malformed_toml_names_line(tmp_path):
    bad = SPEC.format(source="t.csv", running="score", treatment="treated").replace(
        'title = "t"', 'title = "t"\n[data\nsource = 1')
    fails(run_cli("scan", make(tmp_path, spec=bad), "--out", tmp_path / "o"), "spec.toml:line 2", "not valid TOML")


def test_unknown_spec_key_names_closest(tmp_path):
    bad = SPEC.format(source="t.csv", running="score", treatment="treated").replace(
        "discover = false", "discover = false\nalpah = 0.1")
    fails(run_cli("scan", make(tmp_path, spec=bad), "--out", tmp_path / "o"),
          "unknown key [search] 'alpah'", "did you mean 'alpha'", "line 13")


def test_bad_rule_names_file_and_line(tmp_path):
    p = make(tmp_path)
    (tmp_path / "rules.toml").write_text(RULES.format(cutoff=50).replace("at_or_above", "over"))
    fails(run_cli("scan", p, "--out", tmp_path / "o"), "rules.toml:line 5", "eligible = 'over'")


def test_closest_suggests_only_near_misses():
    # A typo gets its key; an unrelated word gets no guess (it was told "did you mean 'omop'?").
    from scanner.errors import closest
    keys = ["batch_rows", "date", "decimal", "engine", "omop", "source", "unit"]
    assert closest("sourse", keys) == " (did you mean 'source'?)"
    assert closest("foo", keys) == ""
