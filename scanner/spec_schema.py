"""The scan spec's keys: one table that the validator (:mod:`scanner.spec`) and the reference
page ``docs/spec.md`` are both built from, so the two cannot drift apart.

``python -m scanner.spec_schema > docs/spec.md`` regenerates the page; a test checks that the
committed page equals the generated one.
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Key:
    section: str          # "" (top level), "data", "running", ...
    name: str
    type: str             # in words, as a TOML user would write it
    default: str          # as TOML, or a phrase in words
    example: str          # one TOML line
    meaning: str


SECTIONS = {
    "": "Top level",
    "data": "[data] — where the table is and how to read it",
    "running": "[[running]] — one table per running variable (score)",
    "treatments": "[treatments] — 0/1 uptake columns",
    "covariates": "[covariates] — columns for the balance check",
    "outcomes": "[outcomes] — columns for power (effects only on request)",
    "rules": "[rules] — rule catalogues",
    "search": "[search] — which cutoffs to examine and how to estimate",
    "output": "[output] — what leaves the machine",
    "events": "[events] — treatment events of a long-format registry (docs/long-format.md)",
    "events.uptake": "[[events.uptake]] — one 0/1 treatment built from events",
    "screen": "[screen] — every measurement kind × every event code (long format)",
}

KEYS: tuple[Key, ...] = (
    Key("", "title", "text", '"cutscan scan"', 'title = "Clinic visits 2019–2023"',
        "Title of the report and the terminal table."),
    Key("", "data", "table", "—", "[data]", "Where the table is and how to read it."),
    Key("", "running", "array of tables", "required", "[[running]]",
        "Running variables; at least one."),
    Key("", "treatments", "table", "required", "[treatments]", "Treatment columns; required."),
    Key("", "covariates", "table", "none", "[covariates]", "Covariates for the balance check."),
    Key("", "outcomes", "table", "none", "[outcomes]", "Outcome columns (power only)."),
    Key("", "rules", "table", "none", "[rules]", "Rule catalogues to test."),
    Key("", "search", "table", "defaults below", "[search]", "Search and estimation settings."),
    Key("", "output", "table", "defaults below", "[output]", "Disclosure control and display."),
    Key("", "events", "table", "none", "[events]",
        "Treatment events: makes the spec long-format (rows are built from measurements)."),
    Key("", "screen", "table", "none", "[screen]",
        "Long format: pair every measurement kind with every event code, in two stages."),

    Key("data", "source", "path (text)", "none: pass data= to scan()", 'source = "visits.parquet"',
        "The table: .csv/.tsv/.txt (optionally .gz), .parquet file or folder, .feather/.arrow, "
        ".dta or .sas7bdat. Relative to the spec file."),
    Key("data", "date", "column name", "none", 'date = "visit_date"',
        "Date of each row: periods for rule timelines, and the order for keep = \"first\"."),
    Key("data", "date_format", "strptime format", "read from the data",
        'date_format = "%d/%m/%Y"',
        "Format of text dates where day and month cannot be told apart."),
    Key("data", "unit", "column name", "none", 'unit = "person_no"',
        "Identifier of the unit (person) a row belongs to; the held-out half is split by it."),
    Key("data", "keep", '"all" or "first"', '"all"', 'keep = "first"',
        "\"first\": for each running variable, each unit's earliest row that holds a value of "
        "that variable (needs unit and date)."),
    Key("data", "engine", '"local" or "spark"', '"local"', 'engine = "spark"',
        "Where the one pass over the rows runs."),
    Key("data", "batch_rows", "whole number ≥ 1", "1000000", "batch_rows = 250000",
        "Rows per batch of the streaming pass (memory vs speed)."),
    Key("data", "missing", "list of numbers or text", "[]", 'missing = [999, -1, "unknown"]',
        "Codes that mean \"not recorded\" in every scanned column. Never list real values "
        "(letters, decimal-comma numbers): map those with value_map or decimal."),
    Key("data", "missing_by_column", "table of column = list", "{}",
        "missing_by_column = { egfr = [-99, 999] }",
        "Missing codes of single columns, added to data.missing."),
    Key("data", "decimal", '"," or "."', "detected per column", 'decimal = ","',
        "Decimal mark of numbers stored as text. Detected when a cell such as 4,8 settles it "
        "(with a decimal_comma warning); set it when a file holds only ambiguous cells "
        "such as 1,234."),
    Key("data", "value_map", "table of column = { text = number }", "{}",
        'value_map = { statin = { yes = 1, no = 0 }, sex = { F = 1, M = 0 } }',
        "Numbers for the codes of flags and categories (keys are cell text, any case; numeric "
        "cells match their shortest text, so { 1 = 1, 2 = 0 } recodes a 1/2 flag). Stata value "
        "labels that read yes/no are used for 0/1 flags without it."),

    Key("data", "person", "column name", "required in the long format", 'person = "person_id"',
        "Long format: the person column of the measurement rows."),
    Key("data", "periods", "path (text)", "none", 'periods = "enrolment.parquet"',
        "Long format: observed time (person, period start, period end); windows outside it are "
        "not counted as no uptake."),
    Key("data", "period_start", "column name", '"period_start"', 'period_start = "enrolled_from"',
        "Long format: start date column of data.periods."),
    Key("data", "period_end", "column name", '"period_end"', 'period_end = "enrolled_to"',
        "Long format: end date column of data.periods."),
    Key("data", "omop", "path (text)", "none", 'omop = "cdm/"',
        "A folder of OMOP CDM v5.4 tables (Parquet or CSV) or a DuckDB file holding them."),

    Key("running", "column", "column name", "required", 'column = "hba1c"',
        "The running variable's column (long format: the value column of the measurement rows)."),
    Key("running", "name", "text", "the column", 'name = "hba1c"',
        "Long format: how outputs name this running variable."),
    Key("running", "where", "table of column = value", "{}", 'where = { test = "HBA1C" }',
        "Long format: which measurement rows hold this score (equality on one or more columns)."),
    Key("running", "index", '"first" or "each"', '"first"', 'index = "each"',
        "Long format: each person's earliest measurement, or every measurement day."),
    Key("running", "concept", "whole number", "none", "concept = 3004410",
        "OMOP: the measurement concept id (value_as_number is the score)."),
    Key("running", "quantity", "text", "none", 'quantity = "hba1c"',
        "What the column measures; links it to rules and plausible ranges (see docs/rules.md "
        "for the known quantities and catalogue [[quantity]] entries for new ones)."),
    Key("running", "unit", "text", "none", 'unit = "%"',
        "Unit of the column; rules stated in another unit are converted onto it."),
    Key("running", "unit_column", "column name", "none", 'unit_column = "hba1c_unit"',
        "A column holding each row's unit; rows in another unit are converted to unit, row by "
        "row (needs quantity and unit). An empty unit cell means unit."),
    Key("running", "unit_map", "table of spelling = unit", "known spellings",
        'unit_map = { pct = "%", IFCC = "mmol/mol" }',
        "How the spellings found in unit_column map to units cutscan knows."),
    Key("running", "bin_width", "positive number", "chosen from the data", "bin_width = 0.5",
        "Width of fixed bins, when the column is not kept on its exact support."),
    Key("running", "treatments", "list of column names", "all treatments",
        'treatments = ["statin"]', "The treatments examined with this running variable."),

    Key("treatments", "columns", "list of column names", "required",
        'columns = ["statin", "referral"]', "0/1 (or yes/no, true/false) uptake columns."),
    Key("covariates", "columns", "list of column names", "[]", 'columns = ["age", "female"]',
        "Covariates whose balance at each cutoff is checked."),
    Key("outcomes", "columns", "list of column names", "[]", 'columns = ["admitted_12m"]',
        "Outcomes, used for power (minimum detectable effects)."),
    Key("outcomes", "effects", "true or false", "false", "effects = true",
        "Also estimate outcome effects (off by default: screening stays blind to outcomes)."),
    Key("rules", "catalogues", "list of paths", "[]", 'catalogues = ["rules/diabetes.toml"]',
        "Rule catalogues (docs/rules.md), relative to the spec file."),

    Key("search", "round_numbers", "true or false", "true", "round_numbers = false",
        "Also examine round-number cutoffs."),
    Key("search", "discover", "true or false", "true", "discover = false",
        "Search for cutoffs nobody declared."),
    Key("search", "confirm", "true or false", "true", "confirm = false",
        "Search on one half of the rows and test on the other half."),
    Key("search", "alpha", "number in (0, 1)", "0.05", "alpha = 0.1",
        "Level for q-values, flags and the search."),
    Key("search", "kernel", "text", '"triangular"', 'kernel = "epanechnikov"',
        "Kernel of the local polynomial fits."),
    Key("search", "degree", "0, 1 or 2", "1", "degree = 2", "Degree of the local polynomial."),
    Key("search", "bandwidth", '"mse", "cer", "ik" or a positive number', '"mse"',
        "bandwidth = 5", "Bandwidth selector, or a fixed bandwidth in running-variable units."),
    Key("search", "per_side", "true or false", "false", "per_side = true",
        "Choose a separate bandwidth on each side."),
    Key("search", "seed", "whole number ≥ 0", "20261201", "seed = 1",
        "Seed of the held-out split and of the simulations."),
    Key("search", "min_rows", "whole number ≥ 1", "50", "min_rows = 200",
        "Rows needed within one step on each side of a round or discovered cutoff."),

    Key("output", "min_cell", "whole number ≥ 1", "11", "min_cell = 20",
        "Counts from 1 to min_cell − 1 are suppressed in every output."),
    Key("output", "top", "whole number ≥ 1", "20", "top = 50",
        "Candidates shown in the terminal table and the report."),

    Key("events", "source", "path (text)", "required", 'source = "dispensing.parquet"',
        "One row per treatment event (Parquet file or folder, or CSV)."),
    Key("events", "person", "column name", "data.person", 'person = "person_id"',
        "Person column of the event rows."),
    Key("events", "date", "column name", "required", 'date = "dispensed_on"', "Event date column."),
    Key("events", "code", "column name", "required", 'code = "drug_code"', "Event code column."),
    Key("events", "uptake", "array of tables", "required (or [screen])", "[[events.uptake]]",
        "The treatments built from events."),
    Key("events.uptake", "name", "text", "required", 'name = "metformin_180d"',
        "The treatment's name in outputs."),
    Key("events.uptake", "codes", "list of text", "required (long format)", 'codes = ["MTF", "A10B*"]',
        "Event codes that count; a trailing * matches a prefix."),
    Key("events.uptake", "concepts", "list of whole numbers", "required (OMOP)",
        "concepts = [1503297]", "OMOP drug or procedure concepts; descendants count too."),
    Key("events.uptake", "days", "[first, last] whole days", "[0, 0]", "days = [0, 180]",
        "Window after the index date, both ends inclusive; the index day is day 0."),
    Key("events.uptake", "prior_days", "whole number ≥ 1", "none", "prior_days = 365",
        "Look-back: index rows with such an event in the days before have this uptake missing."),
    Key("screen", "test", "column name", '"test" (OMOP: measurement_concept_id)', 'test = "lab_code"',
        "Column naming the measurement kind."),
    Key("screen", "value", "column name", '"value" (OMOP: value_as_number)', 'value = "result"',
        "Value column of the measurement rows."),
    Key("screen", "min_persons", "whole number ≥ 1", "500", "min_persons = 1000",
        "Measurement kinds measured in at least this many persons are screened."),
    Key("screen", "min_event_persons", "whole number ≥ 1", "200", "min_event_persons = 500",
        "Event codes seen in at least this many persons are screened."),
    Key("screen", "days", "[first, last] whole days", "[0, 180]", "days = [0, 365]",
        "Uptake window of every pair."),
    Key("screen", "prior_days", "whole number ≥ 1", "none", "prior_days = 365",
        "Look-back of every pair."),
    Key("screen", "index", '"first" or "each"', '"first"', 'index = "each"',
        "Index rows of every measurement kind."),
)


def known() -> dict[str, set[str]]:
    """Valid key names per section (the validator's table)."""
    out: dict[str, set[str]] = {s: set() for s in SECTIONS}
    for k in KEYS:
        out[k.section].add(k.name)
    return out


def markdown() -> str:
    """docs/spec.md: every key with its type, default, example and meaning."""
    lines = ["# Scan spec reference", "",
             "<!-- generated by `python -m scanner.spec_schema > docs/spec.md`; do not edit -->", "",
             "A scan spec is a TOML file. Unknown keys are errors that name the closest valid key.",
             "Paths are relative to the spec file. Rule catalogues, including `[[quantity]]`",
             "entries for quantities and units of your own, are described in `rules.md`.", ""]
    for sec, title in SECTIONS.items():
        lines += [f"## {title}", "", "| key | type | default | example | meaning |",
                  "|---|---|---|---|---|"]
        for k in KEYS:
            if k.section == sec:
                cell = lambda t: t.replace("|", "\\|")
                lines.append(f"| `{k.name}` | {cell(k.type)} | {cell(k.default)} | "
                             f"`{cell(k.example)}` | {cell(k.meaning)} |")
        lines.append("")
    return "\n".join(lines)


if __name__ == "__main__":
    print(markdown(), end="")
