"""A messy extract of our own with planted truth (tests/messy_extract.py), in three renderings:
";" CSV with decimal commas, Stata with value labels, all-text Parquet.  Every warning kind is
pinned on the right column with the right count; the clean demo raises none.

Outside references: the IFCC–NGSP master equation (NGSP % = 0.0915 × IFCC mmol/mol + 2.15;
Hoelzel et al., Clin Chem 2004) converts the planted mmol/mol rows; 190 mg/dL LDL is
190 / 38.67 = 4.913 mmol/L (cholesterol molar mass 386.65 g/mol, from memory).
"""
import json

import numpy as np
import pytest

from tests.messy_extract import write
from scanner.cli import main
from scanner.scan import scan


def kinds(res):
    return [(w["kind"], w["column"]) for w in res.warnings]


def one(res, kind, column, value=None):
    got = [w for w in res.warnings if w["kind"] == kind and w["column"] == column
           and (value is None or f"hold {value:g}," in w["message"])]
    assert len(got) == 1, res.warnings
    return got[0]


@pytest.fixture(scope="module", params=["csv", "dta", "parquet"])
def extract(request, tmp_path_factory):
    folder = tmp_path_factory.mktemp(request.param)
    spec, truth = write(folder, request.param)
    return request.param, scan(spec), truth


def test_every_warning_kind_on_its_column_with_its_count(extract):
    kind, res, truth = extract
    # decimal commas: only the ";" CSV has them; pandas wrote every float cell with a comma
    commas = [w for w in res.warnings if w["kind"] == "decimal_comma"]
    if kind == "csv":
        assert {w["column"]: w["count"] for w in commas} == truth["float_cells"]
    else:
        assert commas == []
    assert one(res, "value_map", "sex")["count"] == truth["n"]
    statin = one(res, "value_map", "statin")
    assert statin["count"] == truth["n"]
    assert ("Stata value labels" in statin["message"]) == (kind == "dta")
    mixed = one(res, "mixed_units", "hba1c")
    assert mixed["count"] == truth["mmol_rows"]
    assert "unit_column" in mixed["message"]
    for code, rows in truth["egfr_codes"].items():
        w = one(res, "sentinel_values", "egfr", code)
        assert w["count"] == rows and "treated as missing" in w["message"]
        assert f"missing_by_column] egfr = [{code:g}]" in w["message"]
    wrong = one(res, "wrong_unit", "glucose")
    assert wrong["count"] == truth["n"] and 'unit = "mmol/L"' in wrong["message"]
    assert one(res, "rule_outside_data", "glucose")["message"].startswith("rule 'hg-glucose-126'")
    lattice = one(res, "cutoff_off_lattice", "ldl")
    assert lattice["count"] == truth["ldl_rows_at_split"]
    assert "between the recorded values 4.9 and 5" in lattice["message"]
    assert "4.913" in lattice["message"]           # 190 / 38.67, the declared value shown too
    rep = one(res, "repeated_units", "pt_no")
    assert rep["count"] == truth["repeats"] and 'data.unit = "pt_no"' in rep["message"]
    assert one(res, "no_variation", "fee_waiver")["count"] == truth["egfr_rows"]
    # nothing else was raised
    assert len(res.warnings) == len(commas) + 10


def test_codes_and_other_units_leave_the_analysis_and_are_counted(extract):
    _, res, truth = extract
    dropped = {(d["column"], d["reason"]): d["rows"] for d in res.data["dropped"]}
    assert dropped[("egfr", "missing-value code outside the plausible range")] == sum(
        truth["egfr_codes"].values())
    assert dropped[("hba1c", "value fits only another unit")] == truth["mmol_rows"]
    st = res.stats["egfr"].pooled()
    assert st.x[st.n > 0].max() <= 140 and st.x[st.n > 0].min() >= 5


def test_declared_hba1c_rule_usable_after_row_by_row_units(tmp_path):
    spec, truth = write(tmp_path, "csv", unit_column=True)
    res = scan(spec)
    w = one(res, "mixed_units", "hba1c")
    assert w["count"] == truth["mmol_rows"] and "converted to % row by row" in w["message"]
    row = next(r for r in res.rows if r["rule_id"] == "hg-hba1c-6.5")
    assert row["verdict"] == "usable" and "sorting" not in row["flags"]
    # every row enters: mmol/mol values were converted (IFCC–NGSP master equation), not dropped
    assert res.stats["hba1c"].total == truth["n"]
    x = res.stats["hba1c"].pooled().x
    assert np.isclose(x, 0.0915 * 48 + 2.15).any()      # 48 mmol/mol = 6.542 %


def test_unknown_unit_spelling_is_refused_with_the_fix(tmp_path, capsys):
    spec, _ = write(tmp_path, "parquet", unit_column=True)
    spec.write_text(spec.read_text().replace('IFCC = "mmol/mol"', 'pct2 = "%"'))
    rc = main(["scan", str(spec), "--out", str(tmp_path / "o"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "unit column 'hba1c_unit' holds 'ifcc'" in err and "unit_map" in err


def test_warnings_reach_json_terminal_and_report(tmp_path, capsys):
    spec, _ = write(tmp_path, "parquet")
    rc = main(["scan", str(spec), "--out", str(tmp_path / "o")])
    assert rc == 0
    err = capsys.readouterr().err
    res = json.loads((tmp_path / "o" / "results.json").read_text())
    assert [w["kind"] for w in res["warnings"]][:2] == ["value_map", "value_map"]
    html = (tmp_path / "o" / "report.html").read_text()
    assert html.index("id='warnings'") < html.index("id='overview'") < html.index("id='ranking'")
    for w in res["warnings"]:
        assert f"cutscan: warning [{w['kind']}]: {w['message']}" in err
        assert w["column"] in html


def test_clean_demo_raises_no_warning(demo_results):
    assert demo_results["warnings"] == []


@pytest.fixture(scope="module")
def demo_results(tmp_path_factory):
    from scanner.demo import write_inputs
    folder = tmp_path_factory.mktemp("demo")
    spec = write_inputs(folder / "input", n=60_000)
    return scan(spec).to_dict()
