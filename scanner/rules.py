"""Rule catalogues (TOML) → :class:`Rule` objects.

A catalogue is a list of ``[[rule]]`` tables: ``id``, ``quantity``, ``unit``, ``cutoff``,
``eligible`` (``below`` | ``at_or_below`` | ``above`` | ``at_or_above``; the ``at_or_`` forms
put the cutoff value itself on the eligible side), optional ``effective_from`` /
``effective_to`` (TOML dates or quoted ISO dates), optional ``treatments``, ``description`` and
``source``.

A rule whose value changed over time is written as two (or more) rules sharing a ``group``
name, each with its own cutoff and dates; the newer one may name the one it superseded with
``replaces = "<id>"``.  ``cutscan check`` follows the whole group.

A catalogue may also declare quantities of its own (for local scores and units the built-in
list in :mod:`scanner.units` does not know)::

    [[quantity]]
    name = "income"
    units = ["thousand VMC/yr"]

Two levels of checking: :func:`load_rules` (used by ``scan`` and ``check``) rejects malformed
rules; :func:`validate_catalogues` (``cutscan rules validate``) also rejects unknown quantities
and units, dangling ``replaces`` and implausible dates, and reports every problem with its
file and line instead of stopping at the first.

Shipped catalogues live in ``rules/`` at the top of the repository (one file per domain).
:func:`shipped_dir` finds them: the ``CUTSCAN_RULES`` environment variable if set, else a
``rules_data`` folder inside the installed package (where a wheel build would place them), else
``rules/`` next to the package directory (the editable install and a source checkout).
"""
from __future__ import annotations

import datetime as dt
import os
import math
import re
import tomllib
from dataclasses import dataclass, asdict
from pathlib import Path

from .errors import SpecError, closest
from . import units as U

ELIGIBLE = ("below", "at_or_below", "above", "at_or_above")
RULE_KEYS = {"id", "quantity", "unit", "cutoff", "eligible", "effective_from", "effective_to",
             "treatments", "description", "source", "group", "replaces"}
QUANTITY_KEYS = {"name", "units", "description"}
REQUIRED = ("id", "quantity", "cutoff", "eligible", "source")
EARLIEST, LATEST = dt.date(1900, 1, 1), dt.date(2100, 12, 31)   # plausible effective dates


@dataclass(frozen=True)
class Rule:
    id: str
    quantity: str
    cutoff: float
    eligible: str
    source: str
    unit: str | None = None
    effective_from: dt.date | None = None
    effective_to: dt.date | None = None
    treatments: tuple[str, ...] | None = None
    description: str = ""
    file: str = ""
    line: int = 0
    group: str | None = None
    replaces: str | None = None

    @property
    def right_closed(self) -> bool:
        """True when rows exactly at the cutoff sit with the right side (x ≥ c)."""
        return self.eligible in ("below", "at_or_above")

    def to_dict(self) -> dict:
        d = asdict(self)
        for k in ("effective_from", "effective_to"):
            d[k] = d[k].isoformat() if d[k] else None
        return d


@dataclass(frozen=True)
class Problem:
    """One catalogue problem, located by file and line."""

    file: str
    line: int
    message: str

    def __str__(self) -> str:
        return f"{self.file}:line {self.line}: {self.message}" if self.line else f"{self.file}: {self.message}"


def _date(value):
    """(date or None, error or None)."""
    if value is None:
        return None, None
    if isinstance(value, dt.datetime):
        return value.date(), None
    if isinstance(value, dt.date):
        return value, None
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value), None
        except ValueError:
            pass
    return None, f"{value!r} is not a date; write it as 2013-01-01."


def _blocks(text: str) -> tuple[list[int], list[int], int]:
    """Line numbers of each [[rule]] and [[quantity]] header, and the line count."""
    lines = text.splitlines()
    rule = [i for i, s in enumerate(lines, 1) if re.match(r"\s*\[\[\s*rule\s*\]\]", s)]
    qty = [i for i, s in enumerate(lines, 1) if re.match(r"\s*\[\[\s*quantity\s*\]\]", s)]
    return rule, qty, len(lines)


def _key_line(lines: list[str], start: int, key: str) -> int:
    """Line of ``key = ...`` in the table that starts at ``start`` (the header line if absent)."""
    for i in range(start, len(lines)):     # ``start`` is 1-based, so this begins after the header
        s = lines[i]
        if re.match(r"\s*\[", s) and start:
            break
        if re.match(rf"\s*{re.escape(key)}\s*=", s):
            return i + 1
    return start


def _read(path: Path) -> tuple[dict | None, str, list[Problem]]:
    if not path.exists():
        return None, "", [Problem(str(path), 0, "rule catalogue not found. Check rules.catalogues "
                                  "in the spec (paths are relative to the spec file).")]
    text = path.read_text(encoding="utf-8-sig")
    try:
        return tomllib.loads(text), text, []
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"line (\d+)", str(exc))
        return None, text, [Problem(str(path), int(m.group(1)) if m else 0,
                                    f"not valid TOML ({exc}). Check quotes and brackets on that "
                                    "line; dates are written 2013-01-01 and must exist.")]


def _parse(path: Path, seen: dict) -> tuple[list[Rule], dict, list[Problem]]:
    """Rules and declared quantities of one file, with every structural problem found."""
    raw, text, problems = _read(path)
    if raw is None:
        return [], {}, problems
    p = str(path)
    lines = text.splitlines()
    rule_lines, qty_lines, _ = _blocks(text)
    for k in sorted(set(raw) - {"rule", "quantity"}):
        problems.append(Problem(p, _key_line(lines, 0, k),
                                f"unknown top-level key '{k}'{closest(k, ['rule', 'quantity'])}; "
                                "a catalogue holds [[rule]] and [[quantity]] tables."))
    for k in ("rule", "quantity"):
        if k in raw and not isinstance(raw[k], list):
            problems.append(Problem(p, _key_line(lines, 0, k) or 1, f"'{k}' must be an array of "
                                    f"tables: write [[{k}]], not [{k}]."))
    quantities = {}
    for i, q in enumerate(raw.get("quantity", []) if isinstance(raw.get("quantity"), list) else []):
        line = qty_lines[i] if i < len(qty_lines) else 0
        for k in q:
            if k not in QUANTITY_KEYS:
                problems.append(Problem(p, _key_line(lines, line, k),
                                        f"unknown quantity key '{k}'{closest(k, QUANTITY_KEYS)}."))
        name, units = q.get("name"), q.get("units", [])
        if not isinstance(name, str) or not isinstance(units, list):
            problems.append(Problem(p, line, "a [[quantity]] needs name = \"...\" and units = [...]."))
            continue
        quantities[name] = [str(u) for u in units]
    rules = []
    for i, r in enumerate(raw.get("rule", []) if isinstance(raw.get("rule"), list) else []):
        line = rule_lines[i] if i < len(rule_lines) else 0
        at = lambda key: _key_line(lines, line, key)   # noqa: E731  (line of a key in this rule)
        bad = []
        for k in r:
            if k not in RULE_KEYS:
                bad.append(Problem(p, at(k), f"unknown rule key '{k}'{closest(k, RULE_KEYS)}."))
        for k in REQUIRED:
            if k not in r:
                bad.append(Problem(p, line, f"rule '{r.get('id', '?')}' is missing '{k}'."))
        cut = r.get("cutoff")
        if "cutoff" in r and (not isinstance(cut, (int, float)) or isinstance(cut, bool)):
            bad.append(Problem(p, at("cutoff"), f"cutoff = {cut!r} must be a number."))
        elif "cutoff" in r and not math.isfinite(cut):
            bad.append(Problem(p, at("cutoff"), f"cutoff = {cut} must be a finite number."))
        for k in ("id", "quantity", "unit", "description", "source"):
            if k in r and not isinstance(r[k], str):
                bad.append(Problem(p, at(k), f"{k} = {r[k]!r} must be text (in quotes)."))
        elig = r.get("eligible")
        if "eligible" in r and elig not in ELIGIBLE:
            bad.append(Problem(p, at("eligible"), f"eligible = '{elig}' must be one of "
                               f"{', '.join(ELIGIBLE)}{closest(str(elig), ELIGIBLE)}."))
        dates = {}
        for k in ("effective_from", "effective_to"):
            dates[k], err = _date(r.get(k))
            if err:
                bad.append(Problem(p, at(k), f"{k} = {err}"))
        start, end = dates["effective_from"], dates["effective_to"]
        if start and end and end < start:
            bad.append(Problem(p, at("effective_to"), f"effective_to {end} is before "
                               f"effective_from {start}."))
        tr = r.get("treatments")
        if tr is not None and not (isinstance(tr, list) and all(isinstance(t, str) for t in tr)):
            bad.append(Problem(p, at("treatments"), "treatments must be a list of column names."))
        rid = str(r.get("id", ""))
        if rid in seen:
            bad.append(Problem(p, at("id"), f"duplicate rule id '{rid}' (first at {seen[rid]})."))
        elif rid:
            seen[rid] = f"{p}:line {line}"
        problems.extend(bad)
        if bad:
            continue
        rules.append(Rule(rid, str(r["quantity"]), float(cut), elig, str(r["source"]),
                          r.get("unit"), start, end, tuple(tr) if tr else None,
                          str(r.get("description", "")), p, line,
                          r.get("group"), r.get("replaces")))
    problems.sort(key=lambda x: x.line)
    return rules, quantities, problems


def _as_paths(paths) -> list[Path]:
    return [Path(paths)] if isinstance(paths, (str, Path)) else [Path(x) for x in paths]


def load_rules(paths) -> list[Rule]:
    """Read one or more catalogues; errors name the file and the line of the offending rule."""
    out, seen = [], {}
    for path in _as_paths(paths):
        rules, _, problems = _parse(path, seen)
        if problems:
            more = f" (and {len(problems) - 1} more problem(s); run cutscan rules validate)" \
                if len(problems) > 1 else ""
            raise SpecError(f"{problems[0]}{more}")
        out.extend(rules)
    return out


def _strict_checks(rules: list[Rule], quantities: dict, lines: dict) -> list[Problem]:
    problems = []
    ids = {r.id: r for r in rules}
    for r in rules:
        at = lambda key: lines[r.file][1](r.line, key)   # noqa: E731
        known_units = quantities.get(r.quantity)
        if r.quantity not in U.QUANTITIES and known_units is None:
            names = list(U.QUANTITIES) + list(quantities)
            problems.append(Problem(r.file, at("quantity"), f"unknown quantity '{r.quantity}'"
                                    f"{closest(r.quantity, names)}; use a built-in quantity "
                                    "(cutscan rules list shows them) or declare it in a "
                                    "[[quantity]] table."))
        elif r.unit is not None:
            ok = (U.lookup(r.unit, r.quantity) is not None if r.quantity in U.QUANTITIES
                  else any(U.same_unit(r.unit, u) for u in known_units))
            if not ok:
                valid = U.units_for(r.quantity) or known_units
                problems.append(Problem(r.file, at("unit"), f"unknown unit '{r.unit}' for "
                                        f"{r.quantity}; known units: {', '.join(valid)}."))
        for k in ("effective_from", "effective_to"):
            d = getattr(r, k)
            if d and not (EARLIEST <= d <= LATEST):
                problems.append(Problem(r.file, at(k), f"{k} {d} is outside {EARLIEST.year}–"
                                        f"{LATEST.year}; check the year."))
        if r.replaces is not None:
            old = ids.get(r.replaces)
            if old is None:
                problems.append(Problem(r.file, at("replaces"), f"replaces = '{r.replaces}' is "
                                        f"not a rule id{closest(r.replaces, ids)}."))
            elif old.quantity != r.quantity:
                problems.append(Problem(r.file, at("replaces"), f"rule '{r.id}' replaces "
                                        f"'{old.id}', which concerns {old.quantity}, not {r.quantity}."))
            elif old.effective_to and r.effective_from and r.effective_from < old.effective_to:
                problems.append(Problem(r.file, at("effective_from"), f"rule '{r.id}' takes "
                                        f"effect {r.effective_from}, before '{old.id}' ends "
                                        f"({old.effective_to})."))
    return problems


def validate_catalogues(paths) -> tuple[list[Rule], list[Problem]]:
    """Every problem in the given catalogues (structural and strict), in file order."""
    rules, quantities, problems, seen, lines = [], {}, [], {}, {}
    for path in _as_paths(paths):
        r, q, probs = _parse(path, seen)
        text = path.read_text(encoding="utf-8-sig").splitlines() if path.exists() else []
        lines[str(path)] = (text, lambda start, key, t=text: _key_line(t, start, key))
        rules.extend(r)
        quantities.update(q)
        problems.extend(probs)
    problems.extend(_strict_checks(rules, quantities, lines))
    order = {str(p): i for i, p in enumerate(_as_paths(paths))}
    problems.sort(key=lambda x: (order.get(x.file, 0), x.line))
    return rules, problems


def shipped_dir() -> Path:
    """Folder of the shipped catalogues (see the module docstring for the search order)."""
    env = os.environ.get("CUTSCAN_RULES")
    if env:
        return Path(env)
    here = Path(__file__).resolve().parent
    for cand in (here / "rules_data", here.parent / "rules"):
        if cand.is_dir() and any(cand.glob("*.toml")):
            return cand
    raise SpecError(f"shipped rule catalogues not found (looked in {here / 'rules_data'} and "
                    f"{here.parent / 'rules'}); set CUTSCAN_RULES to their folder.")


def shipped_catalogues() -> list[Path]:
    """The shipped catalogue files, sorted by name."""
    return sorted(shipped_dir().glob("*.toml"))


def group_of(rule: Rule, rules: list[Rule]) -> list[Rule]:
    """The rule and every rule linked to it by ``group`` or ``replaces``, oldest first."""
    members = {rule.id: rule}
    changed = True
    while changed:
        changed = False
        for r in rules:
            if r.id in members:
                continue
            linked = any((r.group and r.group == m.group) or r.replaces == m.id or m.replaces == r.id
                         for m in members.values())
            if linked and r.quantity == rule.quantity:
                members[r.id] = r
                changed = True
    return sorted(members.values(), key=lambda r: (r.effective_from or dt.date.min, r.id))
