"""Long-format registries: the spec keys of the measurement/event layout, validated.

A long-format registry holds measurements (person, date, test, value) and treatment events
(person, date, code).  The keys below say how analysis rows are built from them; the building
itself is SQL (scanner.events.sql), run by DuckDB or Spark.

Semantics, fixed here and in the README:

* **Index rows.**  ``index = "first"``: each person's earliest measurement of the score (by
  date); ``"each"``: every measurement day of the score.  Several measurements of the same score
  on one day form one index row holding the *lowest* value of that day — a deterministic choice
  that does not depend on file order (documented; a rule on "any value at or above c" would be
  read differently, and such a rule is then better served by a pre-computed column).
* **Uptake windows.**  ``days = [a, b]``: uptake is 1 when the person has an event with one of
  the codes on a day ``index + a`` to ``index + b``, both ends inclusive; an event on the index
  day is day 0.  Otherwise 0.
* **Earlier users.**  ``prior_days = k``: an index row with one of the uptake's codes on days
  ``index − k`` to ``index − 1`` has that uptake missing (it leaves that treatment's analyses
  only), counted as ``treated before``.  ``prior_days`` with a window starting before the index
  day (``a < 0``) is refused: both would claim the same days.
* **Observed time.**  With ``periods``, an uptake is known only when one observation period
  covers every day it looks at — ``index − prior_days`` (or ``index + a`` without a look-back)
  to ``index + b``; otherwise it is missing and counted as ``window not observed``.  Index rows
  of people with no observation period covering the index day are dropped whole.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

from ..errors import SpecError

from ..spec_schema import known

_KNOWN = known()            # the spec schema (also docs/spec.md) holds every key
RUNNING_KEYS = {"name", "where", "index", "concept"}      # [[running]] keys of the long format
EVENTS_KEYS = _KNOWN["events"]
UPTAKE_KEYS = _KNOWN["events.uptake"]
SCREEN_KEYS = _KNOWN["screen"]
OMOP_COVARIATES = ("age", "female")


@dataclass(frozen=True)
class Uptake:
    """One event-derived 0/1 treatment: codes, window after the index date, look-back."""

    name: str
    codes: tuple = ()
    concepts: tuple = ()
    days: tuple = (0, 0)
    prior_days: int | None = None

    @property
    def first_day(self) -> int:
        """First day (relative to the index date) this uptake looks at."""
        return min(-(self.prior_days or 0), self.days[0], 0)


@dataclass(frozen=True)
class Score:
    """One running variable of the long layout: which measurement rows hold it."""

    name: str
    column: str = "value"
    where: tuple = ()                 # ((column, value), ...) equality filters
    index: str = "first"
    concept: int | None = None


@dataclass(frozen=True)
class Screen:
    """A registry-wide screen: every measurement kind with at least ``min_persons`` persons
    paired with every event code seen in at least ``min_event_persons`` persons."""

    test: str = "test"
    value: str = "value"
    min_persons: int = 500
    min_event_persons: int = 200
    days: tuple = (0, 180)
    prior_days: int | None = None
    index: str = "first"


@dataclass(frozen=True)
class Layout:
    """The long-format layout of a spec (None on a spec for a one-row-per-person table)."""

    source: str | None
    person: str
    date: str
    scores: tuple
    uptakes: tuple
    covariates: tuple = ()
    events_source: str | None = None
    events_person: str | None = None
    events_date: str | None = None
    events_code: str | None = None
    periods: str | None = None
    period_start: str = "period_start"
    period_end: str = "period_end"
    omop: str | None = None
    screen: Screen | None = None

    @property
    def treatments(self) -> tuple:
        return tuple(u.name for u in self.uptakes)


def _err(where, msg):
    return SpecError(f"{where}: {msg}")


def _text(v, where, key):
    if not isinstance(v, str) or not v.strip():
        raise _err(where, f"{key} must be text (a column or file name), got {v!r}.")
    return v


def _uptake(u: dict, where: str, omop: bool) -> Uptake:
    from ..errors import closest
    if not isinstance(u, dict):
        raise _err(where, "each [[events.uptake]] must be a table.")
    for k in u:
        if k not in UPTAKE_KEYS:
            raise _err(where, f"unknown key [[events.uptake]] '{k}'{closest(k, UPTAKE_KEYS)}. "
                       f"Valid keys here: {', '.join(sorted(UPTAKE_KEYS))}.")
    name = _text(u.get("name"), where, "events.uptake name")
    codes = u.get("codes", [])
    concepts = u.get("concepts", [])
    if isinstance(codes, (str, int)):
        codes = [codes]
    if isinstance(concepts, int):
        concepts = [concepts]
    if not isinstance(codes, list) or not all(isinstance(c, (str, int)) and not isinstance(c, bool)
                                              for c in codes):
        raise _err(where, f"events.uptake '{name}': codes must be a list of codes, e.g. [\"MTF\", \"A10B*\"].")
    if not isinstance(concepts, list) or not all(isinstance(c, int) and not isinstance(c, bool)
                                                 for c in concepts):
        raise _err(where, f"events.uptake '{name}': concepts must be a list of whole-number concept ids.")
    if omop and not concepts:
        raise _err(where, f"events.uptake '{name}': with data.omop give concepts = [<concept id>, ...].")
    if not omop and not codes:
        raise _err(where, f"events.uptake '{name}': give codes = [\"...\"] (event codes that count "
                   "as uptake; a trailing * matches a prefix).")
    days = u.get("days", [0, 0])
    if not (isinstance(days, list) and len(days) == 2
            and all(isinstance(d, int) and not isinstance(d, bool) for d in days) and days[0] <= days[1]):
        raise _err(where, f"events.uptake '{name}': days = {days!r} must be [first, last] whole "
                   "days after the index date, first ≤ last, e.g. [0, 180].")
    prior = u.get("prior_days")
    if prior is not None and not (isinstance(prior, int) and not isinstance(prior, bool) and prior >= 1):
        raise _err(where, f"events.uptake '{name}': prior_days = {prior!r} must be a whole number ≥ 1.")
    if prior is not None and days[0] < 0:
        # The look-back (days -k .. -1) and a window starting before the index day would share
        # days: one event would both make the person an earlier user and count as uptake.
        raise _err(where, f"events.uptake '{name}': days = {days!r} starts before the index day "
                   f"and prior_days = {prior} looks back over the same days; give days a first "
                   "day ≥ 0 with prior_days, or drop prior_days to count earlier events as uptake.")
    return Uptake(name, tuple(str(c) for c in codes), tuple(concepts), (days[0], days[1]), prior)


def parse_layout(raw: dict, where: str, covariates: tuple) -> Layout | None:
    """The long-format layout of a raw spec dict, or None when the spec has none.

    A spec is long-format when it has an ``[events]`` table or ``data.omop``.
    """
    data = raw.get("data", {}) or {}
    events = raw.get("events")
    omop = data.get("omop")
    if events is None and omop is None:
        for k in ("person", "periods"):
            if k in data:
                raise _err(where, f"data.{k} belongs to the long-format layout; add an [events] "
                           "table (or data.omop) or remove it.")
        return None
    from ..errors import closest
    if events is None:
        events = {}
    if not isinstance(events, dict):
        raise _err(where, "[events] must be a table.")
    for k in events:
        if k not in EVENTS_KEYS:
            raise _err(where, f"unknown key [events] '{k}'{closest(k, EVENTS_KEYS)}. "
                       f"Valid keys here: {', '.join(sorted(EVENTS_KEYS))}.")
    ups = events.get("uptake", [])
    if isinstance(ups, dict):
        ups = [ups]
    screen = _screen(raw.get("screen"), where, omop is not None)
    if not ups and screen is None:
        raise _err(where, "no uptake: add an [[events.uptake]] table with name, codes and days "
                   "(or a [screen] table to pair every measurement with every event code).")
    uptakes = tuple(_uptake(u, where, omop is not None) for u in ups)
    names = [u.name for u in uptakes]
    if len(set(names)) < len(names):
        raise _err(where, f"events.uptake names must differ: {names}.")
    runs = raw.get("running") or []
    if isinstance(runs, dict):
        runs = [runs]
    scores = []
    for r in runs:
        idx = r.get("index", "first")
        if idx not in ("first", "each"):
            raise _err(where, f"running.index = {idx!r} must be 'first' or 'each'.")
        wh = r.get("where", {})
        if not isinstance(wh, dict) or not all(isinstance(v, (str, int, float)) and not isinstance(v, bool)
                                               for v in wh.values()):
            raise _err(where, "running.where must be a table of column = value, e.g. "
                       "where = { test = \"HBA1C\" }.")
        concept = r.get("concept")
        if omop is not None:
            if not isinstance(concept, int) or isinstance(concept, bool):
                raise _err(where, "with data.omop every [[running]] needs concept = <measurement "
                           "concept id> (a whole number).")
            name = r.get("name") or f"concept_{concept}"
            scores.append(Score(_text(name, where, "running.name"), "value_as_number",
                                (("measurement_concept_id", concept),), idx, concept))
        else:
            col = _text(r.get("column"), where, "running.column")
            name = r.get("name") or col
            scores.append(Score(_text(name, where, "running.name"), col,
                                tuple(sorted((str(k), v) for k, v in wh.items())), idx))
    snames = [s.name for s in scores]
    if len(set(snames)) < len(snames):
        raise _err(where, f"running names must differ in the long layout (set name = ...): {snames}.")
    clash = set(snames) & set(names)
    if clash:
        raise _err(where, f"{sorted(clash)} is both a running variable and an uptake; rename one.")
    if omop is not None:
        bad = [c for c in covariates if c not in OMOP_COVARIATES]
        if bad:
            raise _err(where, f"with data.omop the covariates available are {', '.join(OMOP_COVARIATES)}; "
                       f"remove {bad} from [covariates] columns.")
        return Layout(None, "person_id", "measurement_date", tuple(scores), uptakes, covariates,
                      omop=_text(omop, where, "data.omop"), screen=screen)
    person = _text(data.get("person"), where, "data.person")
    date = _text(data.get("date"), where, "data.date (the measurement date)")
    return Layout(
        _text(data.get("source"), where, "data.source"), person, date, tuple(scores), uptakes,
        covariates,
        events_source=_text(events.get("source"), where, "events.source"),
        events_person=events.get("person", person), events_date=_text(events.get("date"), where, "events.date"),
        events_code=_text(events.get("code"), where, "events.code"),
        periods=data.get("periods"), period_start=data.get("period_start", "period_start"),
        period_end=data.get("period_end", "period_end"), screen=screen)


def _screen(raw, where: str, omop: bool) -> Screen | None:
    from ..errors import closest
    if raw is None:
        return None
    if not isinstance(raw, dict):
        raise _err(where, "[screen] must be a table.")
    for k in raw:
        if k not in SCREEN_KEYS:
            raise _err(where, f"unknown key [screen] '{k}'{closest(k, SCREEN_KEYS)}. "
                       f"Valid keys here: {', '.join(sorted(SCREEN_KEYS))}.")
    for k in ("min_persons", "min_event_persons"):
        v = raw.get(k, 1)
        if not (isinstance(v, int) and not isinstance(v, bool) and v >= 1):
            raise _err(where, f"screen.{k} = {v!r} must be a whole number ≥ 1.")
    up = _uptake({"name": "screen", "codes": ["*"], "concepts": [0] if omop else [],
                  "days": raw.get("days", [0, 180]), "prior_days": raw.get("prior_days")}, where, omop)
    idx = raw.get("index", "first")
    if idx not in ("first", "each"):
        raise _err(where, f"screen.index = {idx!r} must be 'first' or 'each'.")
    base = Screen() if not omop else Screen(test="measurement_concept_id", value="value_as_number")
    return replace(base, test=raw.get("test", base.test), value=raw.get("value", base.value),
                   min_persons=raw.get("min_persons", base.min_persons),
                   min_event_persons=raw.get("min_event_persons", base.min_event_persons),
                   days=up.days, prior_days=up.prior_days, index=idx)
