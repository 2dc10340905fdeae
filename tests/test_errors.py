"""The error catalogue (docs/errors.md): every user-facing error, its message and exit code 2.

Each test id (F1, S2, ...) is a row of docs/errors.md; test_catalogue_is_complete checks that the
two lists match.  Inputs are tiny invented tables.
"""
import re
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from scanner.cli import main
from scanner.errors import ColumnNotFoundError, InputError, OutputError, ScanError, SpecError
from scanner.rules import load_rules
from scanner.scan import scan
from scanner.spec import load_spec
from tests.conftest import run_cli

DOC = Path(__file__).resolve().parents[1] / "docs" / "errors.md"

SPEC = """\
title = "errors"
[data]
source = "data.csv"
{data}
[[running]]
column = "score"
{running}
[treatments]
columns = ["treated"]
[covariates]
columns = ["age"]
{rest}
"""


def frame(n=200, seed=3):
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 100, n)
    return pd.DataFrame({"pid": [f"P{i:04d}" for i in range(n)], "score": x,
                         "treated": (rng.random(n) < 0.2 + 0.6 * (x >= 50)).astype(int),
                         "age": rng.normal(50, 10, n).round(1),
                         "visit": pd.date_range("2020-01-01", periods=n, freq="D").strftime("%Y-%m-%d")})


def setup(tmp, data="", running="", rest="", df=None, csv_text=None):
    if csv_text is not None:
        (tmp / "data.csv").write_text(csv_text, encoding="utf-8")
    else:
        (frame() if df is None else df).to_csv(tmp / "data.csv", index=False)
    spec = tmp / "spec.toml"
    spec.write_text(SPEC.format(data=data, running=running, rest=rest), encoding="utf-8")
    return spec


def cli(*args, capsys=None):
    rc = main([str(a) for a in args])
    err = capsys.readouterr().err if capsys else ""
    return rc, err


def refused(capsys, spec, match, out=None):
    """Scan through the CLI in-process: exit 2, one 'cutscan:' message matching, no traceback."""
    rc = main(["scan", str(spec), "--out", str(out or Path(spec).parent / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2, err
    assert err.startswith("cutscan: ") and "Traceback" not in err
    assert re.search(match, err), err
    return err


# ---------------------------------------------------------------------- files
def test_F1_data_file_not_found(tmp_path, capsys):
    spec = setup(tmp_path)
    (tmp_path / "data.csv").unlink()
    refused(capsys, spec, r"data\.csv: file not found\. Check data\.source .*relative to the spec")


def test_F2_unknown_file_type(tmp_path, capsys):
    spec = setup(tmp_path, data='')
    spec.write_text(spec.read_text().replace("data.csv", "data.xlsx"))
    (tmp_path / "data.xlsx").write_text("x")
    refused(capsys, spec, r"unknown file type '\.xlsx'\. cutscan reads \.csv")


def test_F3_folder_without_tables(tmp_path, capsys):
    spec = setup(tmp_path)
    (tmp_path / "folder").mkdir()
    (tmp_path / "folder" / "notes.txt.bak").write_text("x")
    spec.write_text(spec.read_text().replace('"data.csv"', '"folder"'))
    refused(capsys, spec, r"folder holds no \.parquet, \.csv or \.feather files")


def test_F4_csv_unreadable_ragged_row(tmp_path, capsys):
    spec = setup(tmp_path, csv_text="pid,score,treated,age,visit\nP1,1,0,3\nP2,2,1,4,2020-01-01,9\n")
    refused(capsys, spec, r"data\.csv: cannot be read as csv: .*Expected \d columns.*same number of cells")


def test_F4_csv_duplicate_header(tmp_path, capsys):
    spec = setup(tmp_path, csv_text="pid,score,score,treated,age,visit\nP1,1,1,0,3,2020-01-01\n")
    refused(capsys, spec, r"multiple columns named score.*unique names")


def test_F5_csv_value_unlike_first_rows(tmp_path, capsys):
    df = frame(60000)
    df["age"] = df["age"].astype(str)
    df.loc[59990, "age"] = "unknown"          # far beyond the rows pyarrow looks at to guess types
    spec = setup(tmp_path, df=df)
    refused(capsys, spec, r"column 'age' holds numbers in the first rows but 'unknown' at line 59992"
                          r"; fix that cell.*missing_by_column\] age = \['unknown'\]")


def test_F6_spec_not_found(tmp_path, capsys):
    rc, err = cli("scan", tmp_path / "nope.toml", "--out", tmp_path / "o", capsys=capsys)
    assert rc == 2 and "nope.toml: spec file not found" in err


def test_F7_spec_not_utf8(tmp_path, capsys):
    spec = setup(tmp_path)
    spec.write_bytes(b'title = "x"\n\xff\xfe = 1\n')
    refused(capsys, spec, r"spec\.toml:line 2: the scan spec is not UTF-8 text .*save it as UTF-8")


def test_F8_spec_is_a_folder(tmp_path, capsys):
    (tmp_path / "s.toml").mkdir()
    refused(capsys, tmp_path / "s.toml", r"s\.toml: is a folder; give the path of the scan spec file",
            out=tmp_path / "o")


def test_F9_rule_catalogue_not_found(tmp_path, capsys):
    spec = setup(tmp_path, rest='[rules]\ncatalogues = ["missing.toml"]')
    refused(capsys, spec, r"missing\.toml: rule catalogue not found\. Check rules\.catalogues")


def test_F10_report_without_results(tmp_path, capsys):
    rc, err = cli("report", tmp_path, capsys=capsys)
    assert rc == 2 and "results.json: not found; point cutscan report at a folder" in err
    (tmp_path / "results.json").write_text("{not json")
    rc, err = cli("report", tmp_path, capsys=capsys)
    assert rc == 2 and "results.json: not valid JSON (line 1); re-run cutscan scan" in err


def test_F11_stata_file_unreadable(tmp_path, capsys):
    spec = setup(tmp_path)
    (tmp_path / "data.dta").write_bytes(b"not a stata file at all")
    spec.write_text(spec.read_text().replace("data.csv", "data.dta"))
    refused(capsys, spec, r"data\.dta: cannot be read as stata")


# ---------------------------------------------------------------------- spec
SPEC_CASES = [
    ("S1", "", "", "[search\nalpha = 0.05", r"spec\.toml:line \d+: the scan spec is not valid TOML"),
    ("S2", "", "", "[search]\nalpah = 0.1", r"line 13: unknown key \[search\] 'alpah' \(did you mean 'alpha'\?\)"),
    ("S6", "", "bin_width = -1", "", r"bin_width must be a positive number"),
    ("S6", "", "bin_width = inf", "", r"bin_width must be a positive number"),
    ("S9", 'keep = "last"', "", "", r"keep = 'last' must be 'all' or 'first'"),
    ("S10", 'keep = "first"', "", "", r"keep = 'first' needs both data\.unit and data\.date"),
    ("S11", "", "", "[search]\nalpha = 5", r"alpha = 5 must be between 0 and 1"),
    ("S12", "", "", "[search]\ndegree = 4", r"degree = 4 must be 0, 1 or 2"),
    ("S13", "", "", '[search]\nkernel = "triangle"', r"kernel = 'triangle' is unknown \(did you mean 'triangular'\?\)"),
    ("S14", "", "", '[search]\nbandwidth = "wide"', r"bandwidth = 'wide' must be 'mse' \(default\), 'cer', 'ik' or a positive number"),
    ("S14", "", "", "[search]\nbandwidth = nan", r"bandwidth = nan must be 'mse' \(default\), 'cer', 'ik' or a positive number"),
    ("S15", "", "", "[output]\nmin_cell = 0", r"output\.min_cell = 0 must be a whole number ≥ 1"),
    ("S16", "", "", "[rules]\ncatalogues = [1]", r"rules\.catalogues must be a list of file paths"),
    ("S17", "", "", '[search]\nseed = "abc"', r"search\.seed = 'abc' must be a whole number ≥ 0"),
    ("S17", "", "", "[output]\ntop = 0", r"output\.top = 0 must be a whole number ≥ 1"),
    ("S17", "batch_rows = 2.5", "", "", r"data\.batch_rows = 2\.5 must be a whole number ≥ 1"),
    ("S18", 'engine = "gpu"', "", "", r"data\.engine = 'gpu' is not an engine; use 'local' or 'spark'"),
    ("S19", "missing = [true]", "", "", r"data\.missing = \[True\] must be a list of numbers or text codes"),
    ("S20", "missing_by_column = 3", "", "", r"data\.missing_by_column must be a table of column = \[codes\]"),
    ("S21", 'date_format = "%d"', "", "", r"date_format = '%d' is not a full date format"),
    ("S23", "", "treatments = [1]", "", r"running\.treatments must be a list of treatment column names"),
]


@pytest.mark.parametrize("code,data,running,rest,match", SPEC_CASES, ids=[c[0] for c in SPEC_CASES])
def test_spec_errors(tmp_path, capsys, code, data, running, rest, match):
    spec = setup(tmp_path, data=data, running=running, rest=rest)
    refused(capsys, spec, match)
    with pytest.raises(SpecError, match=match):
        load_spec(spec)


def test_S4_S5_S7_S8_structure(tmp_path):
    with pytest.raises(SpecError, match=r"no running variable: add a \[\[running\]\] table"):
        load_spec(_write(tmp_path, '[treatments]\ncolumns = ["d"]'))
    with pytest.raises(SpecError, match=r"each \[\[running\]\] needs column = "):
        load_spec(_write(tmp_path, '[[running]]\nquantity = "x"\n[treatments]\ncolumns = ["d"]'))
    with pytest.raises(SpecError, match=r"each \[\[running\]\] entry must be a table"):
        load_spec(_write(tmp_path, 'running = [1]\n[treatments]\ncolumns = ["d"]'))
    with pytest.raises(SpecError, match=r"no treatment: add \[treatments\] columns"):
        load_spec(_write(tmp_path, '[[running]]\ncolumn = "x"'))
    with pytest.raises(SpecError, match=r"\[treatments\] columns must be a list of column names"):
        load_spec(_write(tmp_path, '[[running]]\ncolumn = "x"\n[treatments]\ncolumns = [1]'))
    with pytest.raises(SpecError, match=r"'treatments' must be a table \(\[treatments\]\)"):
        load_spec(_write(tmp_path, 'treatments = 1\n[[running]]\ncolumn = "x"'))


def test_S3_section_not_a_table(tmp_path):
    with pytest.raises(SpecError, match=r"'output' must be a table \(\[output\]\)"):
        load_spec(_write(tmp_path, 'output = 5\n[[running]]\ncolumn = "x"\n[treatments]\ncolumns = ["d"]'))


def _write(tmp, text):
    p = tmp / "s.toml"
    p.write_text(text)
    return p


def test_S22_too_deeply_nested(tmp_path):
    with pytest.raises(SpecError, match="nests arrays or tables too deeply"):
        load_spec(_write(tmp_path, "title = " + "[" * 5000 + "]" * 5000))


def test_S24_running_lists_unknown_treatment(tmp_path, capsys):
    spec = setup(tmp_path, running='treatments = ["other"]')
    refused(capsys, spec, r"running variable 'score' lists treatment 'other', which is not under \[treatments\]")


def test_S25_no_data_source(tmp_path, capsys):
    spec = setup(tmp_path)
    spec.write_text(spec.read_text().replace('source = "data.csv"', ""))
    refused(capsys, spec, r"no data: set data\.source in the spec or pass data= to scan\(\)")


def test_S26_min_cell_option(tmp_path, capsys):
    spec = setup(tmp_path)
    rc, err = cli("scan", spec, "--out", tmp_path / "o", "--min-cell", "0", "--quiet", capsys=capsys)
    assert rc == 2 and "--min-cell 0: the minimum cell size must be at least 1" in err


# ---------------------------------------------------------------------- rule catalogues
RULE = """\
[[rule]]
id = "r1"
quantity = "egfr"
cutoff = 50
eligible = "at_or_above"
source = "invented for a test"
"""
RULE_CASES = [
    ("R1", RULE.replace('id = "r1"', 'id = "r1'), r"rules\.toml:line 2: (the rule catalogue is )?not valid TOML"),
    ("R2", "cutof = 3\n" + RULE, r"unknown top-level key 'cutof'; a catalogue holds \[\[rule\]\] and \[\[quantity\]\] tables"),
    ("R3", RULE + "cutof = 3\n", r"rules\.toml:line 7: unknown rule key 'cutof' \(did you mean 'cutoff'\?\)"),
    ("R4", RULE.replace('source = "invented for a test"\n', ""), r"line 1: rule 'r1' is missing 'source'"),
    ("R5", RULE.replace("cutoff = 50", 'cutoff = "50"'), r"cutoff = '50' must be a number"),
    ("R6", RULE.replace('"at_or_above"', '"over"'), r"eligible = 'over' must be one of below, at_or_below, above, at_or_above"),
    ("R7", RULE + 'effective_from = "spring"\n', r"effective_from = 'spring' is not a date; write it as 2013-01-01"),
    ("R8", RULE + "effective_from = 2020-01-01\neffective_to = 2019-01-01\n", r"effective_to 2019-01-01 is before effective_from 2020-01-01"),
    ("R9", RULE + "\n" + RULE, r"line 9: duplicate rule id 'r1' \(first at .*line 1\)"),
    ("R10", RULE.replace('id = "r1"', "id = 7"), r"(rule number 1 has 'id' of the wrong type|id = 7 must be text)"),
    ("R11", "rule = 5\n", r"'rule' must be (a list|an array) of (\[\[rule\]\] )?tables"),
    ("R12", RULE.replace("cutoff = 50", "cutoff = nan"), r"(rule number 1 has cutoff = nan; a cutoff must be a finite number|cutoff = nan must be a finite number)"),
]


@pytest.mark.parametrize("code,text,match", RULE_CASES, ids=[c[0] for c in RULE_CASES])
def test_rule_errors(tmp_path, capsys, code, text, match):
    (tmp_path / "rules.toml").write_text(text)
    rc, err = cli("rules", "validate", tmp_path / "rules.toml", capsys=capsys)
    assert rc == 2 and err.startswith("cutscan: ") and re.search(match, err), err
    spec = setup(tmp_path, rest='[rules]\ncatalogues = ["rules.toml"]')
    refused(capsys, spec, match)


def test_V7_too_many_cutoffs_inside_one_bin(tmp_path, capsys):
    # Part j of a bin split at cutoffs is keyed k + j/1024: 1,024 cutoffs or more inside one bin
    # would mix two bins' rows, so the scan refuses them instead.
    df = frame(30000)
    df["score"] = np.random.default_rng(8).uniform(0, 100, len(df))      # on a grid, not exact
    rules = "".join(f'[[rule]]\nid = "r{i}"\nquantity = "egfr"\ncutoff = {50 + i * 1e-5!r}\n'
                    'eligible = "at_or_above"\nsource = "invented for a test"\n\n'
                    for i in range(1100))
    (tmp_path / "rules.toml").write_text(rules)
    spec = setup(tmp_path, df=df, running='quantity = "egfr"',
                 rest='[rules]\ncatalogues = ["rules.toml"]')
    refused(capsys, spec, r"1,\d{3} cutoffs \(declared, or added around declared ones\) fall inside "
                          r"one bin of the binning grid, \[50, .*at most 1,023 can\. Declare fewer "
                          r"cutoffs on running variable 'score'.* They are declared in "
                          r"\S*rules\.toml \(1,100 rules, lines 1–\d+\)\.")


# ---------------------------------------------------------------------- columns
def test_C1_column_not_in_table(tmp_path, capsys):
    spec = setup(tmp_path)
    spec.write_text(spec.read_text().replace('column = "score"', 'column = "scor"'))
    refused(capsys, spec, r"running variable 'scor' is not in the table\. Did you mean 'score'\? "
                          r"Available columns: pid, score, treated, age, visit\. Fix the name")
    with pytest.raises(ColumnNotFoundError, match="Did you mean 'score'"):
        scan({"running": {"column": "scor"}, "treatments": {"columns": ["treated"]}}, data=frame())


def test_C2_missing_codes_for_unknown_column(tmp_path, capsys):
    spec = setup(tmp_path, data="[data.missing_by_column]\nagee = [999]")
    refused(capsys, spec, r"data\.missing_by_column 'agee' is not in the table\. Did you mean 'age'\?")


# ---------------------------------------------------------------------- types
def test_T1_text_in_numeric_column(tmp_path, capsys):
    df = frame()
    df["age"] = df["age"].astype(str)
    df.loc[[3, 9], "age"] = ["72+", "<5"]
    spec = setup(tmp_path, df=df)
    err = refused(capsys, spec, r"(covariate|tracked) column 'age' holds text that is not a number "
                                r"\('72\+', '<5'\); (covariate|tracked) columns must be numeric .*"
                                r"are values, not missing.*value_map\] age = \{\"72\+\" = <number>\}")
    assert "missing_by_column" not in err       # a real value is never offered as a missing code


def test_T1b_letters_are_mapped_not_declared_missing(tmp_path, capsys):
    df = frame()
    df["age"] = np.where(np.arange(len(df)) % 2, "F", "M")
    spec = setup(tmp_path, df=df)
    err = refused(capsys, spec, r"column 'age' holds text that is not a number \('M', 'F'\).*"
                                r"text categories such as 'M' are values, not missing: map them to "
                                r"numbers with \[data.value_map\] age = \{M = 1, F = 0\}")
    assert "missing_by_column" not in err


def test_T2_decimal_comma(tmp_path, capsys):
    """Decimal commas are read, with a warning; with decimal = "." they are refused with the
    key that reads them — never with advice to declare them missing."""
    df = frame()
    df["age"] = df["age"].map(lambda v: f"{v:.1f}".replace(".", ","))
    spec = setup(tmp_path, df=df)
    rc = main(["scan", str(spec), "--out", str(tmp_path / "o"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 0 and "warning [decimal_comma]: column 'age'" in err
    spec = setup(tmp_path, df=df, data='decimal = "."')
    err = refused(capsys, spec, r"holds text that is not a number.*looks like a number with a "
                                r"decimal comma: set \[data\] decimal = \",\"")
    assert "missing_by_column" not in err


def test_T3_dates_as_running_variable(tmp_path, capsys):
    df = frame()
    df["score"] = pd.to_datetime(df["visit"])
    df.to_parquet(tmp_path / "data.parquet")
    spec = setup(tmp_path)
    spec.write_text(spec.read_text().replace("data.csv", "data.parquet"))
    refused(capsys, spec, r"running variable column 'score' holds dates or times .* derive a number "
                          r"from it first \(for example age in days\)")


def test_T4_other_type(tmp_path):
    t = pa.table({"score": pa.array([[1], [2]]), "treated": [0, 1]})
    with pytest.raises(InputError, match=r"running variable column 'score' has type list<item: int64>; "
                                         r"it must be numeric"):
        scan({"running": {"column": "score"}, "treatments": {"columns": ["treated"]}}, data=t)


def test_T5_date_column_wrong_type(tmp_path, capsys):
    df = frame()
    df["visit"] = np.linspace(0.5, 9.5, len(df))
    spec = setup(tmp_path, data='date = "visit"', df=df)
    refused(capsys, spec, r"date column 'visit' has type double; it must hold dates")


def test_T6_numbers_not_yyyymmdd(tmp_path, capsys):
    df = frame()
    df["visit"] = np.arange(len(df))
    spec = setup(tmp_path, data='date = "visit"', df=df)
    refused(capsys, spec, r"date column 'visit' holds numbers \(e\.g\. 0\) that are not yyyymmdd dates")


def test_T7_treatment_not_binary(tmp_path, capsys):
    df = frame()
    df.loc[5, "treated"] = 2
    spec = setup(tmp_path, df=df)
    refused(capsys, spec, r"treatment column 'treated' must be 0/1 \(or true/false\); values seen: 0, 1, 2\. "
                          r"Recode it to 0/1, or list it under covariates")


# ---------------------------------------------------------------------- values
def test_V1_no_usable_values(tmp_path, capsys):
    df = frame()
    df["score"] = np.nan
    df.loc[0, "score"] = 999
    spec = setup(tmp_path, data="missing = [999]", df=df)
    refused(capsys, spec, r"running variable 'score' has no usable values \(all missing or not finite\)")


def test_V2_constant_running_variable(tmp_path, capsys):
    df = frame()
    df["score"] = 7
    spec = setup(tmp_path, df=df)
    refused(capsys, spec, r"running variable 'score' is constant; a cutoff needs values on both sides")


def test_V3_unreadable_date(tmp_path, capsys):
    df = frame()
    df.loc[4, "visit"] = "next tuesday"
    spec = setup(tmp_path, data='date = "visit"', df=df)
    refused(capsys, spec, r"date column 'visit' holds 'next tuesday', which is not a date .*data\.date_format")


def test_V3_impossible_date(tmp_path, capsys):
    df = frame()
    df.loc[4, "visit"] = "2021-02-30"
    spec = setup(tmp_path, data='date = "visit"', df=df)
    refused(capsys, spec, r"holds '2021-02-30', which is not a date")


def test_V4_mixed_day_month_order(tmp_path, capsys):
    df = frame()
    df.loc[0, "visit"], df.loc[1, "visit"] = "13/01/2021", "01/13/2021"
    df.loc[2:, "visit"] = "01/02/2021"
    spec = setup(tmp_path, data='date = "visit"', df=df)
    refused(capsys, spec, r"mixes day-first and month-first dates \(e\.g\. '13/01/2021' and '01/13/2021'\)")


def test_V5_ambiguous_day_month(tmp_path, capsys):
    df = frame()
    df["visit"] = "03/04/2021"
    spec = setup(tmp_path, data='date = "visit"', df=df)
    refused(capsys, spec, r"day and month cannot be told apart; set data\.date_format = '%d/%m/%Y'")


def test_V6_order_changes_between_batches(tmp_path, capsys):
    df = frame()
    df["visit"] = "13/01/2021"
    df.loc[150:, "visit"] = "01/13/2021"
    spec = setup(tmp_path, data='date = "visit"\nbatch_rows = 100', df=df)
    # batch_rows is honoured by the engines that read it; call the parser on two batches directly
    from scanner.parsing import DateParser
    p = DateParser("visit", "data.csv")
    p.parse(pa.array(df["visit"][:150].tolist()))
    with pytest.raises(InputError, match=r"reads as dmy in earlier rows but as mdy at '01/13/2021'"):
        p.parse(pa.array(df["visit"][150:].tolist()))


# ---------------------------------------------------------------------- engines
def test_E1_unknown_engine_api():
    from scanner.engines import BinPlan, bin_table
    from scanner.io import open_table
    with pytest.raises(InputError, match=r"data\.engine = 'gpu' is not an engine; use 'local' or 'spark'"):
        bin_table(open_table(frame()), BinPlan(("score",), ("treated",)), engine="gpu")


def test_E2_unknown_kernel_api():
    from scanner.estimate.kernels import kernel
    with pytest.raises(InputError, match=r"kernel 'box' is unknown; choose one of"):
        kernel("box")


# ---------------------------------------------------------------------- outputs
def test_O1_output_exists_without_force(tmp_path, capsys):
    spec = setup(tmp_path)
    (tmp_path / "out").mkdir()
    refused(capsys, spec, r"out: output folder exists; choose another --out or add --force")


def test_O2_output_is_a_file(tmp_path, capsys):
    spec = setup(tmp_path)
    (tmp_path / "out").write_text("mine")
    rc, err = cli("scan", spec, "--out", tmp_path / "out", "--force", "--quiet", capsys=capsys)
    assert rc == 2 and "out: is a file, not an output folder" in err
    assert (tmp_path / "out").read_text() == "mine"


def test_O3_force_refuses_foreign_folder(tmp_path, capsys):
    spec = setup(tmp_path)
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "thesis.docx").write_text("precious")
    rc, err = cli("scan", spec, "--out", tmp_path / "out", "--force", "--quiet", capsys=capsys)
    assert rc == 2 and "folder was not written by cutscan (no results.json)" in err
    assert (tmp_path / "out" / "thesis.docx").read_text() == "precious"


def test_O4_force_refuses_folder_holding_inputs(tmp_path, capsys):
    spec = setup(tmp_path)
    (tmp_path / "results.json").write_text("{}")   # looks like an output folder, but holds the data
    rc, err = cli("scan", spec, "--out", tmp_path, "--force", "--quiet", capsys=capsys)
    assert rc == 2 and "holds the scan's input" in err
    assert (tmp_path / "data.csv").exists() and spec.exists()


def test_O5_cannot_write(tmp_path, capsys):
    spec = setup(tmp_path)
    (tmp_path / "afile").write_text("x")
    rc, err = cli("scan", spec, "--out", tmp_path / "afile" / "out", "--quiet", capsys=capsys)
    assert rc == 2 and "cannot create the output folder" in err


# ---------------------------------------------------------------------- the boundary
def test_boundary_real_command_exit_2_no_traceback(tmp_path):
    spec = setup(tmp_path, rest="[search]\nalpah = 0.1")
    p = run_cli("scan", spec, "--out", tmp_path / "o")
    assert p.returncode == 2
    assert p.stderr.startswith("cutscan: ") and "Traceback" not in p.stderr
    assert "unknown key [search] 'alpah'" in p.stderr


def test_boundary_debug_shows_traceback(tmp_path):
    spec = setup(tmp_path, rest="[search]\nalpah = 0.1")
    p = run_cli("--debug", "scan", spec, "--out", tmp_path / "o")
    assert p.returncode != 0 and "Traceback" in p.stderr and "SpecError" in p.stderr


def test_boundary_usage_error_is_exit_2(capsys):
    assert main(["scan"]) == 2
    assert "usage:" in capsys.readouterr().err


def test_every_user_error_is_a_scan_error():
    for cls in (InputError, SpecError, ColumnNotFoundError, OutputError):
        assert issubclass(cls, ScanError)
    assert issubclass(InputError, ValueError)


def test_catalogue_is_complete():
    """Every code in docs/errors.md has a test here, and every tested code is documented."""
    doc_codes = set(re.findall(r"^\| ([A-Z]\d+) \|", DOC.read_text(encoding="utf-8"), re.M))
    src = Path(__file__).read_text(encoding="utf-8")
    tested = set(re.findall(r"test_([A-Z]\d+)_", src)) | set(re.findall(r'\("([A-Z]\d+)"', src))
    tested |= {c for m in re.findall(r"test_((?:[A-Z]\d+_)+)", src) for c in m.strip("_").split("_")}
    assert doc_codes, "docs/errors.md lists no codes"
    assert doc_codes - tested == set(), f"documented but untested: {sorted(doc_codes - tested)}"
    assert tested - doc_codes == set(), f"tested but undocumented: {sorted(tested - doc_codes)}"


def test_boundary_numeric_warnings_stay_quiet(tmp_path, capsys):
    """Degenerate sums (values near 1e300) give "not estimable" rows, not numpy warnings."""
    df = frame(2000)
    df["score"] = (df["score"] - 50) * 1e300
    spec = setup(tmp_path, df=df)
    import warnings
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        rc = main(["scan", str(spec), "--out", str(tmp_path / "o"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 0 and "RuntimeWarning" not in err and "Traceback" not in err
    assert not [w for w in seen if issubclass(w.category, RuntimeWarning)]


def test_C1_long_column_list_is_cut_with_a_count():
    # A wide table lists the first 20 columns and says how many more there are.
    err = ColumnNotFoundError("scor", [f"c{i}" for i in range(23)], "wide.csv", "running variable")
    assert "c19 and 3 more. Fix the name in the spec." in str(err) and "...." not in str(err)
