"""Scan spec (TOML) → validated :class:`ScanSpec`.

Unknown keys are errors naming the key and the closest valid one; malformed TOML is an error
naming the file and line.  Paths resolve relative to the spec file.
"""
from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, field, asdict
from pathlib import Path

from .errors import SpecError, closest

KNOWN = {
    "": {"title", "data", "running", "treatments", "covariates", "outcomes", "rules", "search",
         "output"},
    "data": {"source", "date", "unit", "keep", "engine", "batch_rows"},
    "running": {"column", "quantity", "unit", "bin_width", "treatments"},
    "treatments": {"columns"},
    "covariates": {"columns"},
    "outcomes": {"columns", "effects"},
    "rules": {"catalogues"},
    "search": {"round_numbers", "discover", "confirm", "alpha", "kernel", "degree", "bandwidth", "seed",
               "min_rows"},
    "output": {"min_cell", "top"},
}


@dataclass(frozen=True)
class RunningSpec:
    column: str
    quantity: str | None = None
    unit: str | None = None
    bin_width: float | None = None
    treatments: tuple[str, ...] | None = None


@dataclass(frozen=True)
class ScanSpec:
    """A validated scan spec. ``path`` is the spec file (None for a spec built in Python)."""

    running: tuple[RunningSpec, ...]
    treatments: tuple[str, ...]
    covariates: tuple[str, ...] = ()
    outcomes: tuple[str, ...] = ()
    effects: bool = False
    title: str = "cutscan scan"
    source: str | None = None
    date: str | None = None
    unit: str | None = None
    keep: str = "all"
    engine: str = "local"
    batch_rows: int = 1_000_000
    catalogues: tuple[str, ...] = ()
    round_numbers: bool = True
    discover: bool = True
    confirm: bool = True          # discovered cutoffs: search on half 0, estimate on half 1
    alpha: float = 0.05
    kernel: str = "triangular"
    degree: int = 1
    bandwidth: str | float = "ik"
    seed: int = 20261201
    min_rows: int = 50
    min_cell: int = 11
    top: int = 20
    path: str | None = None

    def to_dict(self) -> dict:
        d = asdict(self)
        d["running"] = [asdict(r) for r in self.running]
        return d

    def resolve(self, p: str) -> Path:
        base = Path(self.path).parent if self.path else Path.cwd()
        q = Path(p)
        return q if q.is_absolute() else base / q


def _err(where: str, msg: str) -> SpecError:
    return SpecError(f"{where}: {msg}")


def _line_of(text: str, key: str) -> str:
    for i, line in enumerate(text.splitlines(), 1):
        if re.match(rf"\s*{re.escape(key)}\s*=", line) or re.match(rf"\s*\[+\s*{re.escape(key)}\s*\]+", line):
            return f"line {i}"
    return "?"


def _check_keys(table: dict, section: str, where: str, text: str) -> None:
    for k in table:
        if k not in KNOWN[section]:
            label = f"[{section}] " if section else ""
            raise _err(f"{where}:{_line_of(text, k)}",
                       f"unknown key {label}'{k}'{closest(k, KNOWN[section])}. "
                       f"Valid keys here: {', '.join(sorted(KNOWN[section]))}.")


def _columns(raw, section, where) -> tuple[str, ...]:
    if raw is None:
        return ()
    if not isinstance(raw, dict):
        raise _err(where, f"[{section}] must be a table with columns = [...].")
    cols = raw.get("columns", [])
    if isinstance(cols, str):
        cols = [cols]
    if not isinstance(cols, list) or not all(isinstance(c, str) for c in cols):
        raise _err(where, f"[{section}] columns must be a list of column names.")
    return tuple(cols)


def parse_spec(raw: dict, where: str = "<spec>", text: str = "", path: str | None = None) -> ScanSpec:
    """Validate a spec already parsed from TOML (or built as a dict)."""
    _check_keys(raw, "", where, text)
    for sec in ("data", "treatments", "covariates", "outcomes", "rules", "search", "output"):
        if sec in raw:
            if not isinstance(raw[sec], dict):
                raise _err(where, f"'{sec}' must be a table ([{sec}]).")
            _check_keys(raw[sec], sec, where, text)
    runs = raw.get("running")
    if isinstance(runs, dict):
        runs = [runs]
    if not runs:
        raise _err(where, "no running variable: add a [[running]] table with column = \"...\".")
    running = []
    for r in runs:
        if not isinstance(r, dict):
            raise _err(where, "each [[running]] entry must be a table.")
        _check_keys(r, "running", where, text)
        if not isinstance(r.get("column"), str):
            raise _err(where, "each [[running]] needs column = \"<name>\".")
        bw = r.get("bin_width")
        if bw is not None and not (isinstance(bw, (int, float)) and bw > 0):
            raise _err(f"{where}:{_line_of(text, 'bin_width')}", "bin_width must be a positive number.")
        tr = r.get("treatments")
        running.append(RunningSpec(r["column"], r.get("quantity"), r.get("unit"),
                                   float(bw) if bw else None, tuple(tr) if tr else None))
    treatments = _columns(raw.get("treatments"), "treatments", where)
    if not treatments:
        raise _err(where, "no treatment: add [treatments] columns = [\"...\"] (0/1 uptake columns).")
    data = raw.get("data", {})
    search = raw.get("search", {})
    output = raw.get("output", {})
    outcomes = raw.get("outcomes", {}) or {}
    keep = data.get("keep", "all")
    if keep not in ("all", "first"):
        raise _err(f"{where}:{_line_of(text, 'keep')}", f"keep = '{keep}' must be 'all' or 'first'.")
    if keep == "first" and not (data.get("unit") and data.get("date")):
        raise _err(where, "keep = 'first' needs both data.unit and data.date (earliest row per unit).")
    alpha = search.get("alpha", 0.05)
    if not (isinstance(alpha, (int, float)) and 0 < alpha < 1):
        raise _err(f"{where}:{_line_of(text, 'alpha')}", f"alpha = {alpha!r} must be between 0 and 1.")
    degree = search.get("degree", 1)
    if degree not in (0, 1, 2):
        raise _err(f"{where}:{_line_of(text, 'degree')}", f"degree = {degree!r} must be 0, 1 or 2.")
    kern = search.get("kernel", "triangular")
    from .estimate.kernels import KERNELS
    if kern not in KERNELS:
        raise _err(f"{where}:{_line_of(text, 'kernel')}",
                   f"kernel = '{kern}' is unknown{closest(kern, KERNELS)}; choose one of {', '.join(KERNELS)}.")
    bw = search.get("bandwidth", "ik")
    if not (bw == "ik" or (isinstance(bw, (int, float)) and not isinstance(bw, bool) and bw > 0)):
        raise _err(f"{where}:{_line_of(text, 'bandwidth')}",
                   f"bandwidth = {bw!r} must be 'ik' or a positive number (running-variable units).")
    cats = raw.get("rules", {}).get("catalogues", [])
    if isinstance(cats, str):
        cats = [cats]
    min_cell = output.get("min_cell", 11)
    if not (isinstance(min_cell, int) and min_cell >= 1):
        raise _err(where, f"output.min_cell = {min_cell!r} must be a whole number ≥ 1.")
    return ScanSpec(
        running=tuple(running), treatments=treatments,
        covariates=_columns(raw.get("covariates"), "covariates", where),
        outcomes=_columns(outcomes, "outcomes", where) if outcomes else (),
        effects=bool(outcomes.get("effects", False)) if isinstance(outcomes, dict) else False,
        title=str(raw.get("title", "cutscan scan")), source=data.get("source"),
        date=data.get("date"), unit=data.get("unit"), keep=keep,
        engine=data.get("engine", "local"), batch_rows=int(data.get("batch_rows", 1_000_000)),
        catalogues=tuple(cats), round_numbers=bool(search.get("round_numbers", True)),
        discover=bool(search.get("discover", True)),
        confirm=bool(search.get("confirm", True)), alpha=float(alpha), kernel=kern,
        degree=int(degree), bandwidth=bw if bw == "ik" else float(bw),
        seed=int(search.get("seed", 20261201)), min_rows=int(search.get("min_rows", 50)),
        min_cell=int(min_cell), top=int(output.get("top", 20)), path=path)


def load_spec(path) -> ScanSpec:
    """Read and validate a scan spec file."""
    p = Path(path)
    if not p.exists():
        raise SpecError(f"{p}: spec file not found.")
    text = p.read_text(encoding="utf-8-sig")
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"line (\d+)", str(exc))
        line = f"line {m.group(1)}" if m else "?"
        raise SpecError(f"{p}:{line}: not valid TOML ({exc}). Check quotes, brackets and "
                        "'key = value' on that line.") from None
    return parse_spec(raw, str(p), text, str(p.resolve()))
