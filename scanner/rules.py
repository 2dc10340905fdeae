"""Rule catalogues (TOML) → :class:`Rule` objects.

A catalogue is a list of ``[[rule]]`` tables: ``id``, ``quantity``, ``unit``, ``cutoff``,
``eligible`` (``below`` | ``at_or_below`` | ``above`` | ``at_or_above``), optional
``effective_from`` / ``effective_to`` (TOML dates or quoted ISO dates), optional ``treatments``,
``description`` and ``source``.
"""
from __future__ import annotations

import datetime as dt
import re
import tomllib
from dataclasses import dataclass, asdict
from pathlib import Path

from .errors import SpecError, closest

ELIGIBLE = ("below", "at_or_below", "above", "at_or_above")
RULE_KEYS = {"id", "quantity", "unit", "cutoff", "eligible", "effective_from", "effective_to",
             "treatments", "description", "source"}
REQUIRED = ("id", "quantity", "cutoff", "eligible", "source")


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

    @property
    def right_closed(self) -> bool:
        """True when rows exactly at the cutoff sit with the right side (x ≥ c)."""
        return self.eligible in ("below", "at_or_above")

    def to_dict(self) -> dict:
        d = asdict(self)
        for k in ("effective_from", "effective_to"):
            d[k] = d[k].isoformat() if d[k] else None
        return d


def _date(value, where, key):
    if value is None or isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        return value
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value)
        except ValueError:
            pass
    raise SpecError(f"{where}: {key} = {value!r} is not a date; write it as 2013-01-01.")


def _rule_lines(text: str) -> list[int]:
    return [i for i, line in enumerate(text.splitlines(), 1) if re.match(r"\s*\[\[\s*rule\s*\]\]", line)]


def load_rules(paths) -> list[Rule]:
    """Read one or more catalogues; errors name the file and the line of the offending rule."""
    if isinstance(paths, (str, Path)):
        paths = [paths]
    rules, seen = [], {}
    for path in paths:
        p = Path(path)
        if not p.exists():
            raise SpecError(f"{p}: rule catalogue not found. Check rules.catalogues in the spec "
                            "(paths are relative to the spec file).")
        text = p.read_text(encoding="utf-8-sig")
        try:
            raw = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            m = re.search(r"line (\d+)", str(exc))
            raise SpecError(f"{p}:line {m.group(1) if m else '?'}: not valid TOML ({exc}).") from None
        extra = set(raw) - {"rule"}
        if extra:
            k = sorted(extra)[0]
            raise SpecError(f"{p}: unknown top-level key '{k}'{closest(k, ['rule'])}; a catalogue "
                            "holds only [[rule]] tables.")
        lines = _rule_lines(text)
        for i, r in enumerate(raw.get("rule", [])):
            line = lines[i] if i < len(lines) else 0
            where = f"{p}:line {line}"
            for k in r:
                if k not in RULE_KEYS:
                    raise SpecError(f"{where}: unknown rule key '{k}'{closest(k, RULE_KEYS)}.")
            for k in REQUIRED:
                if k not in r:
                    raise SpecError(f"{where}: rule is missing '{k}'.")
            if not isinstance(r["cutoff"], (int, float)) or isinstance(r["cutoff"], bool):
                raise SpecError(f"{where}: cutoff = {r['cutoff']!r} must be a number.")
            if r["eligible"] not in ELIGIBLE:
                raise SpecError(f"{where}: eligible = '{r['eligible']}' must be one of "
                                f"{', '.join(ELIGIBLE)}{closest(str(r['eligible']), ELIGIBLE)}.")
            start = _date(r.get("effective_from"), where, "effective_from")
            end = _date(r.get("effective_to"), where, "effective_to")
            if start and end and end < start:
                raise SpecError(f"{where}: effective_to {end} is before effective_from {start}.")
            if r["id"] in seen:
                raise SpecError(f"{where}: duplicate rule id '{r['id']}' (first at {seen[r['id']]}).")
            seen[r["id"]] = where
            tr = r.get("treatments")
            rules.append(Rule(str(r["id"]), str(r["quantity"]), float(r["cutoff"]), r["eligible"],
                              str(r["source"]), r.get("unit"), start, end,
                              tuple(tr) if tr else None, str(r.get("description", "")), str(p), line))
    return rules
