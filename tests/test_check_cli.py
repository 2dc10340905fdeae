"""`cutscan check` on the demo's two dated rules, as a user runs it (real command)."""
import json

import pytest

from scanner.demo import write_inputs

from .conftest import run_cli


@pytest.fixture(scope="module")
def demo_spec(tmp_path_factory):
    return write_inputs(tmp_path_factory.mktemp("demo") / "input", n=40_000, seed=7)


def test_check_rule_with_effective_date(demo_spec, tmp_path):
    out = tmp_path / "chk"
    r = run_cli("check", demo_spec, "--rule", "vm-mind-phq9-10", "--out", out)
    assert r.returncode == 0, r.stderr
    assert "difference-in-discontinuities" in r.stdout and "Around 2020-10-01" in r.stdout
    res = json.loads((out / "vm-mind-phq9-10.json").read_text())["checks"][0]
    ch = res["changes"][0]
    # planted in scanner/demo.py: no jump before 2020-10-01, +0.30 after
    assert abs(ch["jump_before"]) < 0.06
    assert abs(ch["jump_after"] - 0.30) < 0.08
    assert abs(ch["did"] - 0.30) < 0.08 and ch["did_se"] > 0
    assert ch["left_out"] is None                      # the date is a quarter's first day
    assert (out / "vm-mind-phq9-10.timeline.png").stat().st_size > 10_000
    again = run_cli("check", demo_spec, "--rule", "vm-mind-phq9-10", "--out", out)
    assert again.returncode == 2 and "--force" in again.stderr


def test_check_rule_whose_value_changed(demo_spec, tmp_path):
    out = tmp_path / "chk"
    r = run_cli("check", demo_spec, "--rule", "nm-bp-start-140", "--out", out, "--period", "year")
    assert r.returncode == 0, r.stderr
    assert "jump at 150" in r.stdout and "jump at 140" in r.stdout
    res = json.loads((out / "nm-bp-start-140.json").read_text())["checks"][0]
    assert res["group"] == ["nm-bp-start-150", "nm-bp-start-140"]
    where = {m["period"]: m["cutoff"] for m in res["moving"]}
    # planted: 150 mmHg until 2021-06-30, 140 mmHg from 2021-07-01 (2021 mixes both)
    assert [where[y] for y in ("2019", "2020")] == [150, 150]
    assert [where[y] for y in ("2022", "2023")] == [140, 140]
    by_rule = {c["rule_id"]: c for c in res["changes"]}
    assert by_rule["nm-bp-start-140"]["did"] > 0.3 and by_rule["nm-bp-start-150"]["did"] < -0.3


def test_check_errors_name_the_fix(demo_spec, tmp_path):
    r = run_cli("check", demo_spec, "--rule", "nm-bp-start-14", "--out", tmp_path / "x")
    assert r.returncode == 2 and "did you mean 'nm-bp-start-140'" in r.stderr
    spec = demo_spec.parent / "nodate.toml"
    spec.write_text(demo_spec.read_text().replace('date = "visit_date"\n', ""))
    r = run_cli("check", spec, "--rule", "nm-bp-start-140", "--out", tmp_path / "y")
    assert r.returncode == 2 and "set data.date" in r.stderr
