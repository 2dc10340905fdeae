"""End to end: `cutscan demo` on the invented Vallmora registry, with its planted truth
(scanner/demo.py lists it)."""
import csv
import json

import pytest

from .conftest import run_cli


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    proc = run_cli("demo", "--out", out)
    assert proc.returncode == 0, proc.stderr
    return out, proc


def _rows(out):
    return json.loads((out / "results.json").read_text())["candidates"]


def test_every_output_parses(demo):
    out, proc = demo
    res = json.loads((out / "results.json").read_text())
    for key in ("version", "spec", "data", "candidates"):
        assert key in res
    design_fields = ["rank", "running", "treatment", "cutoff", "origin", "rule_id", "eligible_side",
                     "jump", "se", "ci_low", "ci_high", "p_value", "q_value", "first_stage_f",
                     "design", "bandwidth", "n_left", "n_right", "distinct_left", "distinct_right",
                     "density_p", "balance_p", "placebo_p", "score", "verdict", "flags"]
    for c in res["candidates"]:
        assert set(design_fields) <= set(c)
    with (out / "candidates.csv").open() as fh:
        assert len(list(csv.DictReader(fh))) == len(res["candidates"])
    html = (out / "report.html").read_text()
    assert "<html" in html and "not proof" in html and "data:image/png;base64" in html
    assert "renal_referral" in proc.stdout            # the terminal table was printed


def test_planted_rules_rank_above_every_decoy(demo):
    rows = _rows(demo[0])
    planted = {("egfr", "renal_referral", 30.0), ("hba1c", "diabetes_education", 6.5)}
    # Every planted mechanism with a real jump (scanner/demo.py); everything else is a decoy.
    real = planted | {("sbp", "bp_medication", 140.0), ("sbp", "bp_medication", 150.0),
                      ("phq9", "talk_therapy", 10.0), ("mobility_grade", "physio_referral", 4.0)}

    def is_real(r):
        key = (r["running"], r["treatment"], r["cutoff"])
        return key in real or (r["running"], r["treatment"]) == ("frailty", "home_nurse") \
            and r["origin"] == "discovered" and abs(r["cutoff"] - 0.37) < 0.01
    ranks = {(r["running"], r["treatment"], r["cutoff"]): r["rank"] for r in rows}
    first_decoy = min(r["rank"] for r in rows if not is_real(r))
    assert max(ranks[p] for p in planted) < first_decoy
    for r in rows:
        if (r["running"], r["treatment"], r["cutoff"]) in planted:
            assert r["verdict"] == "usable", r
            assert r["origin"] == "declared"
    sharp = next(r for r in rows if r["rule_id"] == "nm-renal-30")
    fuzzy = next(r for r in rows if r["rule_id"] == "nm-dsme-6.5")
    assert sharp["design"] == "sharp" and fuzzy["design"] == "fuzzy"
    assert abs(fuzzy["jump"] - 0.45) < 0.05        # planted uptake jump 0.12 → 0.57


def test_decoys_carry_expected_flags(demo):
    rows = _rows(demo[0])
    waiver = next(r for r in rows if r["rule_id"] == "vm-brightpath-waiver")
    assert "sorting" in waiver["flags"] and waiver["verdict"] != "usable"
    walk = [r for r in rows if r["running"] == "walk_minutes" and r["treatment"] == "exercise_programme"
            and r["q_value"] is not None and r["q_value"] < 0.05]
    assert walk and all(r["verdict"] != "usable" for r in walk)
    assert any("heaping" in r["flags"] for r in walk)
    grade = next(r for r in rows if r["running"] == "mobility_grade"
                 and r["treatment"] == "physio_referral" and r["cutoff"] == 4.0)
    assert "coarse" in grade["flags"]
    # The smooth logistic uptake (bmi) and the pure-noise variable produce no usable candidate.
    for r in rows:
        if r["running"] in ("bmi", "wait_days"):
            assert r["verdict"] != "usable", r


def test_existing_output_needs_force(demo):
    out, _ = demo
    proc = run_cli("demo", "--out", out, "--rows", "5000")
    assert proc.returncode == 2 and "--force" in proc.stderr
    assert (out / "results.json").exists()


def test_terminal_table_never_prints_an_underflowed_q_as_zero(demo):
    # The top demo rules have q-values that underflow to 0.0 in results.json; the terminal
    # table shows them below the display floor ("< 0.0001", as the report does), not as "0".
    out, proc = demo
    assert any(c["q_value"] == 0.0 for c in _rows(out))
    lines = proc.stdout.splitlines()
    if not any("┃" in line for line in lines):      # a pipe gets one plain line per candidate
        body = [line for line in lines if line[:3].strip().isdigit()]
        assert body and all(" q 0 " not in line for line in body)
        assert any(" q < 0.0001 " in line for line in body)
        # A robust interval is centred on the bias-corrected jump: the line names that centre.
        robust = [line for line in body if "] robust" in line]
        assert robust and all(", bias-corrected " in line for line in robust)
        return
    head = next(line for line in lines if "┃" in line and " q " in line)
    col = [c.strip() for c in head.split("┃")].index("q")     # wide or compact layout
    cells = [line.split("│")[col].strip() for line in lines
             if line.count("│") >= 6 and line.split("│")[1].strip().isdigit()]
    assert cells and "0" not in cells and "< 0.0001" in cells
