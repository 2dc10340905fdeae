"""Fuzz run: randomly corrupted CSV, spec and rule-catalogue inputs through ``cutscan scan``.

Every case must end in a clean exit-2 message (``cutscan: ...`` on stderr, no traceback, no
"internal error") or exit 0 with a valid results.json.  The command runs in-process through
``scanner.cli.main`` for speed.  Invented data (a simulated 0/1 uptake jump at score 50).

    PYTHONPATH=. python benchmarks/fuzz_inputs.py --cases 3000 --seed 1

writes benchmarks/results/fuzz.md.  tests/test_errors_fuzz.py runs a few hundred cases.
"""
from __future__ import annotations

import argparse
import contextlib
import io
import json
import random
import re
import shutil
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

import numpy as np

RULES = """\
[[rule]]
id = "fz-score-50"
quantity = "score"
cutoff = 50
eligible = "at_or_above"
treatments = ["treated"]
description = "Invented rule for the fuzz run: treat from score 50."
source = "Invented for cutscan's fuzz test"
"""

SPEC = """\
title = "fuzz"
[data]
source = "data.csv"
date = "visit"
missing = [999]

[[running]]
column = "score"
quantity = "score"

[treatments]
columns = ["treated"]

[covariates]
columns = ["age"]

[rules]
catalogues = ["rules.toml"]

[search]
round_numbers = false
"""

JUNK_CELLS = ["abc", "1,234", "1,5", "NA", "", "Y", "N", "true", "inf", "-inf", "nan", "1e308",
              "-1e-300", "999", "\"", "\"a\nb\"", "72+", "<5", "\ufeff", "0x1F", "--1", "1.2.3",
              "2021-13-45", "31/12/2021", "12/31/2021", "2021-02-30", "ä", " 7 ", "1e999",
              "12345678901234567890", "-0", "+3"]
TOML_VALUES = ["1", "-5", "0", "\"x\"", "true", "false", "[1, 2]", "[]", "{a = 1}", "1e999",
               "nan", "inf", "2021-01-01", "\"\"", "[\"a\", 1]", "9999999999999999999", "0.5",
               "\"%d/%m/%Y\"", "\"first\"", "\"../nowhere.csv\"", "[[1]]"]


def make_data(rng: np.random.Generator, n: int = 300) -> str:
    x = rng.integers(0, 100, n)
    d = (rng.random(n) < 0.15 + 0.6 * (x >= 50)).astype(int)
    age = rng.normal(50, 12, n).round(1)
    days = rng.integers(0, 1500, n)
    dates = (np.datetime64("2019-01-01") + days).astype(str)
    lines = ["pid,score,treated,age,visit"]
    lines += [f"P{i % 250:04d},{a},{b},{c},{e}" for i, (a, b, c, e) in enumerate(zip(x, d, age, dates))]
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------- corruptions
def flip_bytes(b: bytes, r: random.Random) -> bytes:
    a = bytearray(b)
    for _ in range(r.randint(1, 5)):
        if a:
            a[r.randrange(len(a))] = r.randrange(256)
    return bytes(a)


def truncate(b: bytes, r: random.Random) -> bytes:
    return b[:r.randrange(len(b) + 1)] if b else b


def delete_line(b: bytes, r: random.Random) -> bytes:
    lines = b.split(b"\n")
    if lines:
        del lines[r.randrange(len(lines))]
    return b"\n".join(lines)


def duplicate_line(b: bytes, r: random.Random) -> bytes:
    lines = b.split(b"\n")
    i = r.randrange(len(lines))
    lines.insert(i, lines[i])
    return b"\n".join(lines)


def junk_cell(b: bytes, r: random.Random) -> bytes:
    lines = b.decode("utf-8", "replace").split("\n")
    i = r.randrange(len(lines))
    cells = lines[i].split(",")
    cells[r.randrange(len(cells))] = r.choice(JUNK_CELLS)
    lines[i] = ",".join(cells)
    return "\n".join(lines).encode()


def junk_column(b: bytes, r: random.Random) -> bytes:
    """The same junk value in many rows of one column (a messy column, not a stray cell)."""
    lines = b.decode("utf-8", "replace").split("\n")
    j, value = r.randrange(5), r.choice(JUNK_CELLS)
    share = r.random()
    for i in range(1, len(lines)):
        cells = lines[i].split(",")
        if j < len(cells) and r.random() < share:
            cells[j] = value
            lines[i] = ",".join(cells)
    return "\n".join(lines).encode()


def header_change(b: bytes, r: random.Random) -> bytes:
    lines = b.decode("utf-8", "replace").split("\n")
    names = lines[0].split(",")
    k = r.randrange(len(names))
    names[k] = r.choice(["", names[(k + 1) % len(names)], names[k].upper(), names[k] + " ", "x"])
    lines[0] = ",".join(names)
    return "\n".join(lines).encode()


def delimiter(b: bytes, r: random.Random) -> bytes:
    return b.replace(b",", r.choice([b";", b"\t", b"|"]))


def bom(b: bytes, r: random.Random) -> bytes:
    return b"\xef\xbb\xbf" + b


def toml_value(b: bytes, r: random.Random) -> bytes:
    lines = b.decode("utf-8", "replace").split("\n")
    eq = [i for i, l in enumerate(lines) if "=" in l]
    if eq:
        i = r.choice(eq)
        lines[i] = lines[i].split("=")[0] + "= " + r.choice(TOML_VALUES)
    return "\n".join(lines).encode()


def toml_key(b: bytes, r: random.Random) -> bytes:
    lines = b.decode("utf-8", "replace").split("\n")
    eq = [i for i, l in enumerate(lines) if "=" in l]
    if eq:
        i = r.choice(eq)
        key, _, val = lines[i].partition("=")
        lines[i] = r.choice(["colum", "sourse", "cutof", "keep", "unit", "missing", "date_format",
                             "bin_width", "eligible", "treatments", "id"]) + " =" + val
    return "\n".join(lines).encode()


def toml_bracket(b: bytes, r: random.Random) -> bytes:
    lines = b.decode("utf-8", "replace").split("\n")
    heads = [i for i, l in enumerate(lines) if l.startswith("[")]
    if heads:
        i = r.choice(heads)
        lines[i] = r.choice([lines[i].replace("]", "", 1), lines[i].replace("[", "[[", 1),
                             "[data.missing_by_column]", "[[running]]", "[rule]", "[[rule]]"])
    return "\n".join(lines).encode()


def decimal_commas(b: bytes, r: random.Random) -> bytes:
    """The export of a European desktop tool: ';' between cells, ',' as the decimal mark."""
    text = b.decode("utf-8", "replace")
    if r.random() < 0.8:
        text = text.replace(",", ";")
    return re.sub(r"(\d)\.(\d)", r"\1,\2", text).encode()


def sentinel_spike(b: bytes, r: random.Random) -> bytes:
    """A missing-value code (−99, 999, ...) in many rows of one column."""
    lines = b.decode("utf-8", "replace").split("\n")
    j, code = r.randrange(5), r.choice(["-99", "999", "-1", "9999", "99", "-9"])
    for i in range(1, len(lines)):
        cells = lines[i].split(",")
        if j < len(cells) and r.random() < 0.1:
            cells[j] = code
            lines[i] = ",".join(cells)
    return "\n".join(lines).encode()


def recode_flag(b: bytes, r: random.Random) -> bytes:
    """The 0/1 treatment written as 1/2, yes/no or M/F codes."""
    lines = b.decode("utf-8", "replace").split("\n")
    one, zero = r.choice([("1", "2"), ("yes", "no"), ("F", "M"), ("Y", "N")])
    for i in range(1, len(lines)):
        cells = lines[i].split(",")
        if len(cells) > 2:
            cells[2] = one if cells[2] == "1" else zero if cells[2] == "0" else cells[2]
            lines[i] = ",".join(cells)
    return "\n".join(lines).encode()


NEW_KEYS = ['decimal = ","', 'decimal = "."', 'decimal = ";"', "decimal = 1",
            "[data.value_map]\ntreated = { 1 = 1, 2 = 0 }",
            "[data.value_map]\ntreated = { yes = 1, no = 0 }",
            "[data.value_map]\ntreated = { F = 1 }", "[data.value_map]\ntreated = 3",
            "[data.value_map]\nnowhere = { a = 1 }", "[data.value_map]\nage = { x = true }",
            'unit_column = "pid"', 'unit_column = "age"\nunit = "%"\nquantity = "hba1c"',
            'unit_map = { a = "%" }', 'unit_column = "pid"\nunit_map = { P0001 = "kg" }',
            'quantity = "egfr"\nunit = "mL/min/1.73m2"', 'quantity = "hba1c"\nunit = "mmol/mol"']


def new_keys(b: bytes, r: random.Random) -> bytes:
    """Keys for decimals, value maps and unit columns, well or badly formed, in some table."""
    lines = b.decode("utf-8", "replace").split("\n")
    heads = [i for i, l in enumerate(lines) if l.startswith("[")] or [0]
    i = r.choice(heads)
    lines.insert(i + 1, r.choice(NEW_KEYS))
    return "\n".join(lines).encode()


CSV_MUTATIONS = [flip_bytes, truncate, delete_line, duplicate_line, junk_cell, junk_cell,
                 junk_column, junk_column, header_change, delimiter, bom, decimal_commas,
                 sentinel_spike, sentinel_spike, recode_flag]
TOML_MUTATIONS = [flip_bytes, truncate, delete_line, duplicate_line, toml_value, toml_value,
                  toml_key, toml_bracket, bom, new_keys, new_keys]


# ---------------------------------------------------------------------- one case
def run_case(case: int, seed: int, work: Path) -> dict:
    """Build inputs, corrupt them, run the command; return what happened."""
    r = random.Random(seed * 1_000_003 + case)
    rng = np.random.default_rng([seed, case])
    folder = work / f"case{case}"
    folder.mkdir(parents=True)
    files = {"data.csv": make_data(rng).encode(), "spec.toml": SPEC.encode(), "rules.toml": RULES.encode()}
    applied = []
    for _ in range(r.randint(1, 3)):
        target = r.choice(["data.csv", "data.csv", "spec.toml", "spec.toml", "rules.toml"])
        fn = r.choice(CSV_MUTATIONS if target == "data.csv" else TOML_MUTATIONS)
        files[target] = fn(files[target], r)
        applied.append(f"{target}:{fn.__name__}")
    for name, content in files.items():
        (folder / name).write_bytes(content)
    before = {n: (folder / n).read_bytes() for n in files}
    out, err = io.StringIO(), io.StringIO()
    from scanner.cli import main
    try:
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            rc = main(["scan", str(folder / "spec.toml"), "--out", str(folder / "out"), "--quiet"])
        escaped = None
    except BaseException as exc:  # noqa: BLE001 - anything escaping main is a finding
        rc, escaped = None, f"{type(exc).__name__}: {exc}"
    msg = err.getvalue()
    problem = None
    if escaped:
        problem = f"exception escaped main: {escaped}"
    elif rc not in (0, 2):
        problem = f"exit {rc}"
    elif "Traceback" in msg or "internal error" in msg:
        problem = "traceback or internal error on stderr"
    elif rc == 2 and not msg.startswith("cutscan: "):
        problem = "exit 2 without a cutscan message"
    elif rc == 0:
        try:
            res = json.loads((folder / "out" / "results.json").read_text())
            if not isinstance(res.get("candidates"), list):
                problem = "results.json without a candidate list"
        except (OSError, ValueError) as exc:
            problem = f"exit 0 but results.json unreadable: {exc}"
    if any((folder / n).read_bytes() != b for n, b in before.items()):
        problem = problem or "an input file was modified"
    shutil.rmtree(folder, ignore_errors=True)
    return {"case": case, "rc": rc, "mutations": applied, "message": msg.strip()[:300],
            "problem": problem}


def run_cases(n: int, seed: int = 1) -> list[dict]:
    work = Path(tempfile.mkdtemp(prefix="cutscan-fuzz-"))
    try:
        return [run_case(i, seed, work) for i in range(n)]
    finally:
        shutil.rmtree(work, ignore_errors=True)


def summary(results: list[dict], seconds: float, seed: int) -> str:
    rc = Counter(str(r["rc"]) for r in results)
    bad = [r for r in results if r["problem"]]
    first_words = Counter(r["message"].split(":")[0] if r["rc"] == 2 else "" for r in results)
    lines = ["# Fuzz run over corrupted inputs", "",
             f"Command: `PYTHONPATH=. python benchmarks/fuzz_inputs.py --cases {len(results)} --seed {seed}`",
             "", f"- cases: {len(results)} ({seconds:.0f} s)",
             f"- exit 0 (valid results.json): {rc.get('0', 0)}",
             f"- exit 2 (clean message): {rc.get('2', 0)}",
             f"- problems (traceback, internal error, other exit code, modified input): {len(bad)}", ""]
    if bad:
        lines += ["## Problems", ""] + [f"- case {r['case']} {r['mutations']}: {r['problem']} — "
                                        f"`{r['message'][:160]}`" for r in bad[:50]]
    kinds = Counter()
    for r in results:
        if r["rc"] == 2:
            m = r["message"]
            kinds[m.split(": ", 2)[-1][:70]] += 1
    lines += ["", "## Most common exit-2 messages (text after the file name, first 70 characters)", ""]
    lines += [f"- {k!r}: {v}" for k, v in kinds.most_common(15)]
    return "\n".join(lines) + "\n"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", type=int, default=3000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--out", default=str(Path(__file__).parent / "results" / "fuzz.md"))
    a = ap.parse_args()
    t = time.time()
    results = run_cases(a.cases, a.seed)
    text = summary(results, time.time() - t, a.seed)
    Path(a.out).write_text(text, encoding="utf-8")
    print(text)
    return 1 if any(r["problem"] for r in results) else 0


if __name__ == "__main__":
    sys.exit(main())
