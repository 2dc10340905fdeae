"""Scan spec (TOML) → validated :class:`ScanSpec`.

Unknown keys are errors naming the key and the closest valid one; malformed TOML is an error
naming the file and line.  Paths resolve relative to the spec file.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field, asdict
from pathlib import Path

from .errors import SpecError, closest, parse_toml, read_text
from .events.layout import RUNNING_KEYS, parse_layout
from .spec_schema import known

KNOWN = known()          # section -> valid keys (scanner.spec_schema, also docs/spec.md)


@dataclass(frozen=True)
class RunningSpec:
    column: str
    quantity: str | None = None
    unit: str | None = None
    bin_width: float | None = None
    treatments: tuple[str, ...] | None = None
    unit_column: str | None = None      # a column holding each row's unit
    unit_map: dict = field(default_factory=dict)   # spelling in unit_column -> unit


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
    bandwidth: str | float = "mse"
    per_side: bool = False
    seed: int = 20261201
    min_rows: int = 50
    min_cell: int = 11
    top: int = 20
    path: str | None = None
    missing: tuple = ()                 # codes meaning "missing" in every scanned column
    missing_by_column: dict = field(default_factory=dict)   # column -> extra missing codes
    date_format: str | None = None      # strptime format of data.date when it is ambiguous text
    layout: object = None               # scanner.events.Layout for long-format registries
    decimal: str | None = None          # "," or "." for numbers stored as text; None = detect
    value_map: dict = field(default_factory=dict)   # column -> {cell text: number}

    def codes(self) -> dict:
        """Declared missing codes per scanned column (global codes plus the column's own)."""
        cols = [r.column for r in self.running] + list(self.treatments + self.covariates + self.outcomes)
        out = {}
        for c in dict.fromkeys(cols + list(self.missing_by_column)):
            cc = tuple(self.missing) + tuple(self.missing_by_column.get(c, ()))
            if cc:
                out[c] = cc
        return out

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


_TEXT, _BOOL, _WHOLE = (str,), (bool,), (int,)
# Expected TOML types of plain keys (section, key) -> (types, words for the message).
TYPES = {
    ("", "title"): (_TEXT, "text"), ("data", "source"): (_TEXT, "a path (text)"),
    ("data", "date"): (_TEXT, "a column name"), ("data", "unit"): (_TEXT, "a column name"),
    ("data", "engine"): (_TEXT, "'local' or 'spark'"), ("data", "batch_rows"): (_WHOLE, "a whole number ≥ 1"),
    ("running", "quantity"): (_TEXT, "text"), ("running", "unit"): (_TEXT, "text"),
    ("outcomes", "effects"): (_BOOL, "true or false"),
    ("search", "round_numbers"): (_BOOL, "true or false"), ("search", "discover"): (_BOOL, "true or false"),
    ("search", "seed"): (_WHOLE, "a whole number ≥ 0"), ("search", "min_rows"): (_WHOLE, "a whole number ≥ 1"),
    ("output", "top"): (_WHOLE, "a whole number ≥ 1"),
}
_LOWEST = {("data", "batch_rows"): 1, ("search", "seed"): 0, ("search", "min_rows"): 1,
           ("output", "top"): 1}


def _check_types(table: dict, section: str, where: str, text: str) -> None:
    for k, v in table.items():
        want = TYPES.get((section, k))
        if not want:
            continue
        types, words = want
        wrong = not isinstance(v, types) or (bool not in types and isinstance(v, bool))
        if not wrong and (section, k) in _LOWEST:
            wrong = v < _LOWEST[(section, k)] or v > 2 ** 62
        if wrong:
            label = f"{section}.{k}" if section else k
            raise _err(f"{where}:{_line_of(text, k)}", f"{label} = {v!r} must be {words}.")
    if section == "data" and table.get("engine", "local") not in ("local", "spark"):
        raise _err(f"{where}:{_line_of(text, 'engine')}",
                   f"data.engine = {table['engine']!r} is not an engine; use 'local' or 'spark'.")


def _check_keys(table: dict, section: str, where: str, text: str) -> None:
    _check_types(table, section, where, text)
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


def _code_list(value, where: str, key: str) -> tuple:
    if isinstance(value, (int, float, str)) and not isinstance(value, bool):
        value = [value]
    if not isinstance(value, list) or not all(
            isinstance(v, (int, float, str)) and not isinstance(v, bool) for v in value):
        raise _err(where, f"{key} = {value!r} must be a list of numbers or text codes, "
                   "e.g. [999, -1, \"unknown\"].")
    return tuple(value)


def _missing(data: dict, where: str, text: str):
    codes = _code_list(data.get("missing", []), f"{where}:{_line_of(text, 'missing')}", "data.missing")
    per = data.get("missing_by_column", {})
    if not isinstance(per, dict):
        raise _err(f"{where}:{_line_of(text, 'missing_by_column')}",
                   "data.missing_by_column must be a table of column = [codes], e.g. "
                   "[data.missing_by_column] followed by age = [999].")
    by_col = {str(k): _code_list(v, f"{where}:{_line_of(text, str(k))}", f"missing_by_column.{k}")
              for k, v in per.items()}
    fmt = data.get("date_format")
    if fmt is not None:
        import datetime as _dt
        ok = isinstance(fmt, str) and "%" in fmt
        if ok:
            try:
                sample = _dt.datetime(2021, 3, 31)
                ok = _dt.datetime.strptime(sample.strftime(fmt), fmt).date() == sample.date()
            except ValueError:
                ok = False
        if not ok:
            raise _err(f"{where}:{_line_of(text, 'date_format')}",
                       f"date_format = {fmt!r} is not a full date format; write it with %d, %m "
                       "and %Y, e.g. '%d/%m/%Y'.")
    return codes, by_col, fmt


def _unit_column(r: dict, where: str, text: str):
    """running.unit_column and unit_map, checked against the units known for the quantity."""
    from .units import lookup, units_for
    uc, umap = r.get("unit_column"), r.get("unit_map", {})
    if uc is None:
        if umap:
            raise _err(f"{where}:{_line_of(text, 'unit_map')}",
                       "unit_map needs unit_column = \"<column holding each row's unit>\".")
        return None, {}
    if not isinstance(uc, str):
        raise _err(f"{where}:{_line_of(text, 'unit_column')}", "unit_column must be a column name.")
    if not (r.get("quantity") and r.get("unit")):
        raise _err(f"{where}:{_line_of(text, 'unit_column')}",
                   f"unit_column = {uc!r} needs quantity and unit in the same [[running]] table: "
                   "rows are converted to unit, using the quantity's conversions.")
    if not isinstance(umap, dict) or not all(isinstance(v, str) for v in umap.values()):
        raise _err(f"{where}:{_line_of(text, 'unit_map')}",
                   "unit_map must be a table of spelling = unit, e.g. unit_map = { pct = \"%\" }.")
    q = r["quantity"]
    for spelling, unit in umap.items():
        if lookup(unit, q) is None:
            known_units = ", ".join(units_for(q)) or "none known"
            raise _err(f"{where}:{_line_of(text, 'unit_map')}",
                       f"unit_map maps {spelling!r} to {unit!r}, which is not a unit of {q} "
                       f"(units of {q}: {known_units}).")
    return uc, {str(k).strip().lower(): v for k, v in umap.items()}


def _decimal(data: dict, where: str, text: str):
    dec = data.get("decimal")
    if dec is not None and dec not in (",", "."):
        raise _err(f"{where}:{_line_of(text, 'decimal')}",
                   f"decimal = {dec!r} must be \",\" (decimal commas) or \".\" (points).")
    return dec


def _value_map(data: dict, where: str, text: str) -> dict:
    vm = data.get("value_map", {})
    line = f"{where}:{_line_of(text, 'value_map')}"
    example = "value_map = { statin = { yes = 1, no = 0 } }"
    if not isinstance(vm, dict):
        raise _err(line, f"data.value_map must be a table of column = {{ text = number }}, e.g. {example}.")
    out = {}
    for col, m in vm.items():
        ok = isinstance(m, dict) and m and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in m.values())
        if not ok:
            raise _err(line, f"value_map.{col} = {m!r} must map cell text to numbers, e.g. {example}.")
        out[str(col)] = {str(k): float(v) for k, v in m.items()}
    return out


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
    layout = parse_layout(raw, where, _columns(raw.get("covariates"), "covariates", where)) \
        if isinstance(raw.get("data", {}), dict) else None
    if not runs and not (layout is not None and layout.screen is not None):
        raise _err(where, "no running variable: add a [[running]] table with column = \"...\".")
    running = []
    for r in runs or ():
        if not isinstance(r, dict):
            raise _err(where, "each [[running]] entry must be a table.")
        _check_keys(r, "running", where, text)
        if layout is not None:
            r = dict(r, column=layout.scores[len(running)].name)
        elif set(r) & RUNNING_KEYS:
            raise _err(where, f"running keys {sorted(set(r) & RUNNING_KEYS)} belong to the "
                       "long-format layout; add an [events] table (or data.omop) or remove them.")
        if not isinstance(r.get("column"), str):
            raise _err(where, "each [[running]] needs column = \"<name>\".")
        bw = r.get("bin_width")
        if bw is not None and not (isinstance(bw, (int, float)) and not isinstance(bw, bool)
                                   and 0 < bw < float("inf")):
            raise _err(f"{where}:{_line_of(text, 'bin_width')}", "bin_width must be a positive number.")
        tr = r.get("treatments")
        if isinstance(tr, str):
            tr = [tr]
        if tr is not None and not (isinstance(tr, list) and all(isinstance(t, str) for t in tr)):
            raise _err(f"{where}:{_line_of(text, 'treatments')}",
                       "running.treatments must be a list of treatment column names.")
        uc, umap = _unit_column(r, where, text)
        running.append(RunningSpec(r["column"], r.get("quantity"), r.get("unit"),
                                   float(bw) if bw else None, tuple(tr) if tr else None, uc, umap))
    treatments = _columns(raw.get("treatments"), "treatments", where)
    if layout is not None:
        treatments = layout.treatments + treatments
    if not treatments and not (layout is not None and layout.screen is not None):
        raise _err(where, "no treatment: add [treatments] columns = [\"...\"] (0/1 uptake columns).")
    data = raw.get("data", {})
    search = raw.get("search", {})
    output = raw.get("output", {})
    outcomes = raw.get("outcomes", {}) or {}
    keep = data.get("keep", "all")
    if keep not in ("all", "first"):
        raise _err(f"{where}:{_line_of(text, 'keep')}", f"keep = '{keep}' must be 'all' or 'first'.")
    if layout is not None and (keep != "all" or data.get("unit")):
        raise _err(where, "in the long-format layout each [[running]] picks its index rows "
                   "(index = 'first' or 'each'); remove data.keep and data.unit (the person "
                   "column is data.person).")
    if keep == "first" and not (data.get("unit") and data.get("date")):
        raise _err(where, "keep = 'first' needs both data.unit and data.date (earliest row per unit).")
    codes, by_col, date_format = _missing(data, where, text)
    alpha = search.get("alpha", 0.05)
    if not (isinstance(alpha, (int, float)) and 0 < alpha < 1):
        raise _err(f"{where}:{_line_of(text, 'alpha')}", f"alpha = {alpha!r} must be between 0 and 1.")
    degree = search.get("degree", 1)
    if isinstance(degree, bool) or degree not in (0, 1, 2):
        raise _err(f"{where}:{_line_of(text, 'degree')}", f"degree = {degree!r} must be 0, 1 or 2.")
    kern = search.get("kernel", "triangular")
    from .estimate.kernels import KERNELS
    if not isinstance(kern, str) or kern not in KERNELS:
        raise _err(f"{where}:{_line_of(text, 'kernel')}",
                   f"kernel = '{kern}' is unknown{closest(str(kern), KERNELS)}; choose one of {', '.join(KERNELS)}.")
    bw = search.get("bandwidth", "mse")
    choices = ("mse", "cer", "ik")
    if not (bw in choices or (isinstance(bw, (int, float)) and not isinstance(bw, bool)
                              and 0 < bw < float("inf"))):
        hint = closest(bw, choices) if isinstance(bw, str) else ""
        raise _err(f"{where}:{_line_of(text, 'bandwidth')}",
                   f"bandwidth = {bw!r}{hint} must be 'mse' (default), 'cer', 'ik' or a positive "
                   "number (running-variable units).")
    per_side = search.get("per_side", False)
    if not isinstance(per_side, bool):
        raise _err(f"{where}:{_line_of(text, 'per_side')}",
                   f"per_side = {per_side!r} must be true or false.")
    cats = raw.get("rules", {}).get("catalogues", [])
    if isinstance(cats, str):
        cats = [cats]
    if not isinstance(cats, list) or not all(isinstance(c, str) for c in cats):
        raise _err(f"{where}:{_line_of(text, 'catalogues')}",
                   "rules.catalogues must be a list of file paths, e.g. [\"rules/kidney.toml\"].")
    min_cell = output.get("min_cell", 11)
    if isinstance(min_cell, bool) or not (isinstance(min_cell, int) and min_cell >= 1):
        raise _err(where, f"output.min_cell = {min_cell!r} must be a whole number ≥ 1.")
    return ScanSpec(
        running=tuple(running), treatments=treatments,
        covariates=_columns(raw.get("covariates"), "covariates", where),
        outcomes=_columns(outcomes, "outcomes", where) if outcomes else (),
        effects=bool(outcomes.get("effects", False)) if isinstance(outcomes, dict) else False,
        title=str(raw.get("title", "cutscan scan")), source=data.get("source"),
        date=layout.date if layout else data.get("date"),
        unit=layout.person if layout else data.get("unit"), keep=keep, layout=layout,
        engine=data.get("engine", "local"), batch_rows=int(data.get("batch_rows", 1_000_000)),
        catalogues=tuple(cats), round_numbers=bool(search.get("round_numbers", True)),
        discover=bool(search.get("discover", True)),
        confirm=bool(search.get("confirm", True)), alpha=float(alpha), kernel=kern,
        degree=int(degree), bandwidth=bw if isinstance(bw, str) else float(bw), per_side=per_side,
        seed=int(search.get("seed", 20261201)), min_rows=int(search.get("min_rows", 50)),
        min_cell=int(min_cell), top=int(output.get("top", 20)), path=path,
        missing=codes, missing_by_column=by_col, date_format=date_format,
        decimal=_decimal(data, where, text), value_map=_value_map(data, where, text))


def load_spec(path) -> ScanSpec:
    """Read and validate a scan spec file."""
    p = Path(path)
    if not p.exists():
        raise SpecError(f"{p}: spec file not found.")
    text = read_text(p, "scan spec")
    raw = parse_toml(text, p, "scan spec")
    return parse_spec(raw, str(p), text, str(p.resolve()))
