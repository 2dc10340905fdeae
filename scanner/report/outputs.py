"""results.json, candidates.csv and the terminal table, rendered from one results dict.

Disclosure control: every count of rows in the outputs that lies between 1 and ``min_cell − 1``
is replaced by null and listed under ``suppressed`` (default ``min_cell`` = 11, after the US CMS
cell size suppression policy, which forbids showing counts from 1 to 10).
"""
from __future__ import annotations

import csv
import json
import math
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from ..errors import InputError

RESULTS_VERSION = "1.0"
COUNT_FIELDS = ("n_left", "n_right")
CSV_FIELDS = ("rank", "running", "treatment", "cutoff", "origin", "rule_id", "eligible_side",
              "jump", "se", "ci_low", "ci_high", "p_value", "q_value", "first_stage_f", "design",
              "bandwidth", "n_left", "n_right", "distinct_left", "distinct_right", "density_p",
              "balance_p", "placebo_p", "score", "verdict", "flags")


def clean(value):
    """JSON-safe copy: NaN/inf → None, numpy scalars → Python."""
    if isinstance(value, dict):
        return {str(k): clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [clean(v) for v in value]
    if isinstance(value, (np.floating, float)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def suppress(count, min_cell: int):
    """None for a count of 1..min_cell-1, else the count."""
    if count is None:
        return None
    return None if 0 < count < min_cell else count


def results_dict(result) -> dict:
    """The documented results.json structure (docs/output.md)."""
    spec = result.spec
    m = spec.min_cell
    rows = []
    suppressed = 0
    for r in result.rows:
        row = dict(r)
        for f in COUNT_FIELDS:
            if row.get(f) is not None and suppress(row[f], m) is None and row[f] > 0:
                row[f] = None
                suppressed += 1
        rows.append(row)
    from .plots import uptake_bins
    for row in rows[:spec.top]:
        if result.stats and row["running"] in result.stats:
            row["plot"] = uptake_bins(result.stats[row["running"]], row, m)
    data = dict(result.data)
    dropped = []
    for d in data.get("dropped", []):
        d = dict(d)
        if suppress(d["rows"], m) is None:
            d["rows"] = None
            suppressed += 1
        dropped.append(d)
    data["dropped"] = dropped
    return clean({
        "version": RESULTS_VERSION,
        "cutscan_version": _pkg_version(),
        "created": result.created,
        "title": spec.title,
        "spec": spec.to_dict(),
        "data": data,
        "n_candidates": len(rows),
        "n_tested": rows[0]["n_tested"] if rows else 0,
        "disclosure": {"min_cell": m, "suppressed_counts": suppressed},
        "notes": list(result.notes),
        "candidates": rows,
    })


def _pkg_version():
    from .. import __version__
    return __version__


def tidy_rows(candidates: list[dict]) -> list[dict]:
    out = []
    for c in candidates:
        row = {k: c.get(k) for k in CSV_FIELDS}
        row["flags"] = ";".join(c.get("flags") or [])
        out.append(row)
    return out


def write_json(results: dict, path: Path) -> None:
    path.write_text(json.dumps(results, indent=2, sort_keys=False, allow_nan=False) + "\n",
                    encoding="utf-8")


def write_csv(results: dict, path: Path) -> None:
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(CSV_FIELDS))
        w.writeheader()
        for row in tidy_rows(results["candidates"]):
            w.writerow({k: ("" if v is None else v) for k, v in row.items()})


def write_outputs(result, out: Path, force: bool = False) -> Path:
    """Write results.json, candidates.csv and report.html into ``out``.

    Files are written into a temporary folder beside ``out`` and moved into place at the end, so
    an interrupted scan leaves no half-written output.  An existing ``out`` is replaced only
    with ``force``.
    """
    out = Path(out)
    if out.exists() and not force:
        raise InputError(f"{out}: output folder exists; choose another --out or add --force to replace it.")
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
    try:
        results = result.to_dict()
        write_json(results, tmp / "results.json")
        write_csv(results, tmp / "candidates.csv")
        from .html import write_report
        write_report(results, tmp / "report.html", result.stats)
        if out.exists():
            old = out.with_name(f".{out.name}.old")
            if old.exists():
                shutil.rmtree(old)
            os.replace(out, old)
            os.replace(tmp, out)
            shutil.rmtree(old)
        else:
            os.replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out


def _num(v, fmt):
    return "—" if v is None else format(v, fmt)


def terminal_table(results: dict, top: int = 20):
    """A rich Table of the best candidates."""
    from rich.table import Table
    grid = results.get("n_grid_points") or 0
    scanned = f" (search: {grid} grid cutoffs examined)" if grid else ""
    t = Table(title=f"{results['title']} — {results['n_candidates']} candidates, "
                    f"{results['n_tested']} tested{scanned}, best {min(top, results['n_candidates'])} shown",
              header_style="bold", show_lines=False)
    for col, just in (("#", "right"), ("running", "left"), ("treatment", "left"),
                      ("cutoff", "right"), ("origin", "left"), ("jump [95% CI]", "right"),
                      ("F", "right"), ("q", "right"), ("score", "right"), ("verdict", "left"),
                      ("flags", "left")):
        t.add_column(col, justify=just, overflow="fold")
    style = {"usable": "bold green", "caution": "yellow", "doubtful": "magenta",
             "no jump": "dim", "not estimable": "dim red"}
    for c in results["candidates"][:top]:
        ci = ("" if c["ci_low"] is None else f" [{c['ci_low']:+.2f}, {c['ci_high']:+.2f}]")
        f = c["first_stage_f"]
        t.add_row(str(c["rank"]), c["running"], c["treatment"], f"{c['cutoff']:g}",
                  c.get("rule_id") or c["origin"], _num(c["jump"], "+.3f") + ci,
                  "—" if f is None else (">9999" if f > 9999 else f"{f:.0f}"),
                  _num(c["q_value"], ".2g"), _num(c["score"], ".0f"),
                  f"[{style.get(c['verdict'], '')}]{c['verdict']}[/]", " ".join(c["flags"]))
    return t
