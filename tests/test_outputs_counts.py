"""The outputs add up: candidate and test counts agree across results.json, candidates.csv, the
terminal lines, results.md and the report; the CSV carries reasons and the interval's kind.

Reference for the test family: Benjamini & Hochberg (1995) adjust over every test run, so
n_tested must equal the number of finite p-values the q-values were computed from."""
import csv
import json
import math

import pytest

from scanner.cli import main
from scanner.demo import write_inputs
from scanner.report.exports import density_label


@pytest.fixture(scope="module")
def out(tmp_path_factory):
    folder = tmp_path_factory.mktemp("counts")
    spec = write_inputs(folder / "input", n=40_000, seed=3)
    assert main(["scan", str(spec), "--out", str(folder / "o"), "--quiet"]) == 0
    return folder / "o"


def test_counts_agree_across_outputs(out, capsys):
    res = json.loads((out / "results.json").read_text())
    rows = list(csv.DictReader((out / "candidates.csv").open()))
    cands = res["candidates"]
    assert res["n_candidates"] == len(cands) == len(rows)
    finite = sum(1 for c in cands if c["p_value"] is not None and math.isfinite(c["p_value"]))
    assert res["tests"]["candidates"] == finite
    assert res["n_tested"] == res["tests"]["candidates"] + res["tests"]["searches"]
    # every step of the sequential search is one test: a step that became a discovered row is
    # counted by the row, every other step (attached to a candidate, or the last empty step)
    # by its search-adjusted p-value
    steps = sum(len(p["steps"]) for p in res["search"]["pairs"])
    found = sum(1 for c in cands if c["origin"] == "discovered" and c["p_value"] is not None
                and math.isfinite(c["p_value"]))
    assert res["tests"]["searches"] == steps - found > 0
    assert all(c["n_tested"] == res["n_tested"] for c in cands)
    # every finite q-value comes from that family: no q below its own p, none above 1
    assert all(c["q_value"] >= c["p_value"] - 1e-15 for c in cands if c["q_value"] is not None)
    html = (out / "report.html").read_text()
    assert f"{res['n_tested']:,} tests in the q-value family" in html
    assert f"{res['tests']['candidates']:,} candidates with a p-value" in html
    md = (out / "results.md").read_text()
    assert f"{res['n_candidates']} cutoffs examined" in md
    # the terminal lines (a pipe) say the same
    assert main(["report", str(out)]) == 0
    from scanner.report.outputs import plain_lines
    head = plain_lines(res, 5).splitlines()
    assert head[0].startswith(f"{res['title']}: {res['n_candidates']} candidates, "
                              f"{res['n_tested']} tests in the q-value family")
    assert len(head) == 6


def test_csv_carries_reasons_interval_kind_and_density_test(out):
    res = json.loads((out / "results.json").read_text())
    rows = list(csv.DictReader((out / "candidates.csv").open()))
    for c, r in zip(res["candidates"], rows):
        assert r["reasons"] == " | ".join(c["reasons"]) and r["reasons"]
        assert r["interval"] == (c.get("interval") or "")
        assert r["density_method"] == (c.get("density_method") or "")
    top = res["candidates"][0]
    assert rows[0]["interval"] in ("robust", "honest")
    html = (out / "report.html").read_text()
    assert density_label(top["density_method"]) in html


def test_piped_terminal_gets_one_line_per_candidate_with_interval(tmp_path):
    from tests.conftest import run_cli
    spec = write_inputs(tmp_path / "input", n=20_000, seed=4)
    p = run_cli("scan", spec, "--out", tmp_path / "o")
    assert p.returncode == 0
    res = json.loads((tmp_path / "o" / "results.json").read_text())
    lines = p.stdout.splitlines()
    top = min(res["spec"]["top"], res["n_candidates"])
    body = [l for l in lines if l[:3].strip().isdigit()]
    assert len(body) == top
    c = res["candidates"][0]
    assert f"[{c['ci_low']:+.3f}, {c['ci_high']:+.3f}] {c['interval']}" in body[0]
    assert " F " in body[0] and " q " in body[0]


def test_markdown_names_the_centre_of_a_robust_interval(out):
    # A robust bias-corrected interval is centred on the bias-corrected jump (Calonico,
    # Cattaneo & Titiunik 2014), not on the conventional one: results.md, like the terminal and
    # the report, names that centre, so an estimate never stands alone outside its interval.
    res = json.loads((out / "results.json").read_text())
    md = (out / "results.md").read_text()
    shown = {int(line.split("|")[1]) for line in md.splitlines() if line[:2] == "| "
             and line.split("|")[1].strip().isdigit()}
    robust = [c for c in res["candidates"] if c["interval"] == "robust" and c["rank"] in shown]
    assert robust
    for c in robust:
        assert (f"{c['jump']:+.3f}, bias-corrected {c['jump_bc']:+.3f} "
                f"[{c['ci_low']:+.3f}, {c['ci_high']:+.3f}] robust") in md
