"""The SQL that turns measurements and events into analysis rows, for DuckDB and Spark SQL.

One query text serves both engines: dates become whole day numbers (days since 1970-01-01)
once, and everything after that is integer arithmetic, joins, ``row_number()`` windows and
``GROUP BY`` — SQL both dialects share.  Only identifier quoting and the day-number and
string-type expressions differ (:data:`DIALECTS`).  The semantics are documented in
:mod:`scanner.events.layout`.

The query reads three relations the runner registers: ``meas`` (measurement rows), ``ev``
(event rows) and, with observed time, ``obs`` (person, period start, period end).  Its result
(the compact analysis table) has one row per index row: the person, the index day, the value
``_x`` of the running variable numbered ``_score``, the uptakes as bit masks of hits and of
earlier use with one observed-window flag per distinct window, the covariates and ``_noobs``
(index day outside observed time).  :func:`scan_sql` turns it into the rows the scan reads.
"""
from __future__ import annotations

from dataclasses import dataclass

from .layout import Layout, Uptake


@dataclass(frozen=True)
class Dialect:
    name: str
    quote: str

    def q(self, ident: str) -> str:
        return f"{self.quote}{ident.replace(self.quote, self.quote * 2)}{self.quote}"

    def day(self, expr: str) -> str:
        """Whole days since 1970-01-01 of a date, timestamp or ISO-date text expression."""
        if self.name == "spark":
            return f"datediff(CAST({expr} AS DATE), DATE'1970-01-01')"
        return f"(CAST(CAST({expr} AS DATE) AS DATE) - DATE '1970-01-01')"

    def shl(self, value: str, bits: str) -> str:
        if self.name == "spark":
            return f"shiftleft(CAST({value} AS BIGINT), {bits})"
        return f"(CAST({value} AS BIGINT) << {bits})"

    def bit(self, mask: str, j: int) -> str:
        """Bit ``j`` of a BIGINT mask, as 0/1."""
        if self.name == "spark":
            return f"(shiftright({mask}, {j}) & 1)"
        return f"(({mask} >> {j}) & 1)"

    def row_id(self) -> str:
        """A unique row number, a join key only (output order comes from (running variable,
        person, day), which identify an index row).  DuckDB numbers the rows in no particular
        order inside a MATERIALIZED CTE, so every reference sees the same numbers; Spark inlines
        CTEs, so there the number must be deterministic: an ordered row_number()."""
        return ("row_number() OVER (ORDER BY _score, person, day)" if self.name == "spark"
                else "row_number() OVER ()")

    @property
    def materialized(self) -> str:
        return "" if self.name == "spark" else "MATERIALIZED "

    def from_day(self, expr: str) -> str:
        if self.name == "spark":
            return f"date_add(DATE'1970-01-01', CAST({expr} AS INT))"
        return f"(DATE '1970-01-01' + CAST({expr} AS INTEGER))"


DIALECTS = {"duckdb": Dialect("duckdb", '"'), "spark": Dialect("spark", "`")}


def literal(v) -> str:
    if isinstance(v, str):
        return "'" + v.replace("'", "''") + "'"
    return repr(v)


def code_map(lay: Layout) -> dict:
    """``uc`` (uptake j, exact code) and ``ucp`` (uptake j, code prefix) as portable SELECTs.

    A trailing ``*`` in a code matches a prefix, compared as text (``substring``, not ``LIKE``),
    so ``%`` and ``_`` in codes are literal text.
    """
    exact, pref = [], []
    for j, u in enumerate(lay.uptakes):
        for c in u.codes:
            if c.endswith("*"):
                pref.append(f"SELECT {j} AS j, {literal(c[:-1])} AS prefix")
            else:
                exact.append(f"SELECT {j} AS j, {literal(c)} AS code")
    none = "SELECT -1 AS j, '' AS {0} WHERE 1 = 0"
    return {"uc": " UNION ALL ".join(exact) or none.format("code"),
            "ucp": " UNION ALL ".join(pref) or none.format("prefix")}


def _score_groups(lay: Layout) -> list[list[int]]:
    """Running variables read by one query: same value column, one equality filter on the same
    column, same index rule (a screen's measurement kinds share one pass over the rows)."""
    groups: dict = {}
    out = []
    for i, s in enumerate(lay.scores):
        if len(s.where) == 1:
            groups.setdefault((s.column, s.where[0][0], s.index), []).append(i)
        else:
            out.append([i])
    return list(groups.values()) + out


def _score_rows(lay: Layout, ids: list, d: Dialect) -> str:
    """Index rows of the running variables ``ids``: one per person (first) or per person-day
    (each) and variable; several values on one day keep the lowest."""
    s = lay.scores[ids[0]]
    q = d.q
    covs = "".join(f", {q(c)}" for c in lay.covariates)
    cond = [f"{q(s.column)} IS NOT NULL", f"{q(lay.date)} IS NOT NULL", f"{q(lay.person)} IS NOT NULL"]
    if len(ids) == 1:
        cond += [f"{q(k)} = {literal(v)}" for k, v in s.where]
        kind, join, score = "0", "", f"{ids[0]}"
    else:
        col = q(s.where[0][0])
        vals = ", ".join(literal(lay.scores[i].where[0][1]) for i in ids)
        cond.append(f"{col} IN ({vals})")
        # The running variable's number straight from the filter column, compared in the column's
        # own type (a DOUBLE column holding 5.0 equals the spec's 5; as text '5.0' <> '5').
        whens = " ".join(f"WHEN {col} = {literal(lay.scores[i].where[0][1])} THEN {i}" for i in ids)
        kind = f"CASE {whens} END"
        join, score = "", "kind"
    part = "kind, person" if s.index == "first" else "kind, person, day"
    order = "day, x" + "".join(f", {q(c)}" for c in lay.covariates)
    return (f"SELECT {score} AS _score, person, day, x{covs} FROM ("
            f"SELECT *, row_number() OVER (PARTITION BY {part} ORDER BY {order}) AS _k FROM ("
            f"SELECT {kind} AS kind, CAST({q(lay.person)} AS STRING) AS person, "
            f"{d.day(q(lay.date))} AS day, CAST({q(s.column)} AS DOUBLE) AS x{covs} FROM meas "
            f"WHERE {' AND '.join(cond)}) m) r{join} WHERE _k = 1")


def _bucket(day: str, span: int) -> str:
    """Bucket of ``span`` days holding a day number (floor division, also for negative days)."""
    return f"CAST(floor(({day}) / CAST({int(span)} AS DOUBLE)) AS BIGINT)"


def analysis_steps(lay: Layout, dialect: str = "duckdb") -> tuple[list, str]:
    """The query building the analysis rows of a long-format layout, in steps: a list of
    (name, SELECT) whose results later steps read by name, and the final SELECT.

    Events reach the index rows through one range join: ``evj`` holds each (person, day,
    uptake) once, with its bucket of ``hi - lo + 1`` days (the span every uptake window and
    look-back fits in); an index row's span touches at most two buckets, so the join on
    (person, bucket) meets only the events near the index date instead of all of a person's
    events — codes matched through the code map ``uc``/``ucp`` — and the join, grouped by
    (index row, uptake), gives each uptake's hit and look-back flags; they are folded into one
    bit mask per 62 uptakes and index row.  One join for all uptakes, and masks rather than a
    column per uptake in the aggregate, keep a screen of many event codes to one pass over the
    events and a narrow aggregate.
    """
    d = DIALECTS[dialect]
    q = d.q
    ups = lay.uptakes
    lo = min(u.first_day for u in ups)
    hi = max(u.days[1] for u in ups)
    span = hi - lo + 1
    idx0 = " UNION ALL ".join(_score_rows(lay, g, d) for g in _score_groups(lay))
    ctes = [("idx", f"SELECT *, {d.row_id()} AS _rid FROM ({idx0}) i0"),
            ("evj", f"SELECT person, day, j, {_bucket('day', span)} AS bk FROM ("
             "SELECT DISTINCT person, day, j FROM ("
             "SELECT e.person, e.day, u.j FROM ev e JOIN uc u ON e.code = u.code UNION ALL "
             "SELECT e.person, e.day, u.j FROM ev e JOIN ucp u "
             "ON substring(e.code, 1, length(u.prefix)) = u.prefix) x) y")]
    # Each index row looks at days day+lo .. day+hi: at most two buckets of that span.
    ib = (f"(SELECT i._rid, i.person, i.day, {_bucket(f'i.day + ({lo})', span)} + t.t AS bk "
          "FROM idx i CROSS JOIN (SELECT 0 AS t UNION ALL SELECT 1 AS t) t)")
    # Hits per (index row, uptake), then one BIGINT bit mask per 62 uptakes and index row.
    uw = " UNION ALL ".join(f"SELECT {j} AS j, {u.days[0]} AS a, {u.days[1]} AS b, "
                            f"{u.prior_days or 0} AS k" for j, u in enumerate(ups))
    ctes.append(("hl", f"SELECT i._rid, e.j, "
                f"max(CASE WHEN e.day BETWEEN i.day + w.a AND i.day + w.b THEN 1 ELSE 0 END) AS hit, "
                f"max(CASE WHEN w.k > 0 AND e.day BETWEEN i.day - w.k AND i.day - 1 THEN 1 ELSE 0 END) "
                f"AS prior FROM {ib} i JOIN evj e ON e.person = i.person AND e.bk = i.bk "
                f"AND e.day BETWEEN i.day + ({lo}) AND i.day + ({hi}) "
                f"JOIN ({uw}) w ON w.j = e.j GROUP BY i._rid, e.j"))
    masks = []
    for g in range((len(ups) + MASK_BITS - 1) // MASK_BITS):
        sel = f"CASE WHEN j >= {g * MASK_BITS} AND j < {(g + 1) * MASK_BITS}"
        masks.append(f"bit_or({sel} AND hit = 1 THEN {d.shl(1, f'j - {g * MASK_BITS}')} ELSE 0 END) AS h{g}")
        masks.append(f"bit_or({sel} AND prior = 1 THEN {d.shl(1, f'j - {g * MASK_BITS}')} ELSE 0 END) AS p{g}")
    ctes.append(("hits", f"SELECT _rid, {', '.join(masks)} FROM hl GROUP BY _rid"))
    observed = lay.periods or lay.omop
    if observed:
        ctes.append(("cov", "SELECT i._rid, min(o.start_day) AS p0, max(o.end_day) AS p1 FROM idx i "
                     "JOIN obs o ON o.person = i.person AND i.day BETWEEN o.start_day AND o.end_day "
                     "GROUP BY i._rid"))
    # The table keeps the bit masks and one observed-window flag per distinct window (a screen's
    # uptakes share one), not a column per uptake: writing a thousand-pair screen's status
    # columns cost more than the reads that decode them (uptake_parts).
    inner = ["i._score", "i._rid", "i.person AS _person", "i.day AS _day", "i.x AS _x"]
    for g in range((len(ups) + MASK_BITS - 1) // MASK_BITS):
        inner += [f"coalesce(h.h{g}, 0) AS _h{g}", f"coalesce(h.p{g}, 0) AS _p{g}"]
    for m, (f0, b) in enumerate(windows(lay)):
        seen = (f"(c.p0 IS NOT NULL AND c.p0 <= i.day + ({f0}) AND c.p1 >= i.day + ({b}))"
                if observed else "TRUE")
        inner.append(f"CAST(CASE WHEN {seen} THEN 1 ELSE 0 END AS TINYINT) AS _s{m}")
    inner.append("CASE WHEN c.p0 IS NULL THEN 1 ELSE 0 END AS _noobs" if observed else "0 AS _noobs")
    inner += [f"i.{q(c)}" for c in lay.covariates]
    joins = " LEFT JOIN hits h ON h._rid = i._rid"
    if observed:
        joins += " LEFT JOIN cov c ON c._rid = i._rid"
    return ctes, f"SELECT {', '.join(inner)} FROM idx i{joins}"


def windows(lay: Layout) -> list:
    """Distinct (first day, last day) every uptake looks at, relative to the index date."""
    return sorted({(u.first_day, u.days[1]) for u in lay.uptakes})


def uptake_parts(lay: Layout, j: int, dialect: str = "duckdb") -> tuple[str, str, str]:
    """(earlier use, window not observed, hit) of uptake ``j`` as conditions/0-1 expressions
    over the compact analysis table."""
    d = DIALECTS[dialect]
    u = lay.uptakes[j]
    g, k = divmod(j, MASK_BITS)
    prior = f"{d.bit(f'_p{g}', k)} = 1" if u.prior_days else "FALSE"
    unseen = f"_s{windows(lay).index((u.first_day, u.days[1]))} = 0"
    return prior, unseen, d.bit(f"_h{g}", k)


def uptake_value(lay: Layout, j: int, dialect: str = "duckdb") -> str:
    """Uptake ``j`` as the scan sees it: 0/1, NULL after earlier use or an unobserved window."""
    prior, unseen, hit = uptake_parts(lay, j, dialect)
    return f"CASE WHEN {prior} OR {unseen} THEN NULL ELSE CAST({hit} AS DOUBLE) END"


def analysis_sql(lay: Layout, dialect: str = "duckdb") -> str:
    """:func:`analysis_steps` as one query (common table expressions), as Spark SQL runs it."""
    d = DIALECTS[dialect]
    steps, final = analysis_steps(lay, dialect)
    return "WITH " + ",\n".join(f"{n} AS {d.materialized if n == 'idx' else ''}({sel})"
                                 for n, sel in steps) + "\n" + final


def scan_sql(lay: Layout, dialect: str, table: str, columns=None) -> str:
    """The analysis rows as the scan reads them, from the compact table of :func:`analysis_sql`.

    The compact table holds one value column for all running variables (``_x`` with the
    running variable's number in ``_score``) and the uptakes as bit masks of hits and earlier
    use with observed-window flags (:func:`uptake_parts`); here they become one column per running variable
    (NULL on the other variables' rows) and 0/1/NULL uptakes, for the kept rows in a fixed order.
    ``columns`` picks and orders the output columns (default: all).
    """
    q = DIALECTS[dialect].q
    expr = {lay.person: "_person", lay.date: DIALECTS[dialect].from_day("_day")}
    expr.update({s.name: f"CASE WHEN _score = {k} THEN _x END" for k, s in enumerate(lay.scores)})
    expr.update({u.name: uptake_value(lay, j, dialect) for j, u in enumerate(lay.uptakes)})
    expr.update({c: q(c) for c in lay.covariates})
    cols = ", ".join(f"{expr[c]} AS {q(c)}" for c in (columns or expr))
    return f"SELECT {cols} FROM {table} WHERE _noobs = 0 ORDER BY _score, _person, _day"


MASK_BITS = 62              # uptakes per BIGINT bit mask (sign bit and one spare left alone)


# ------------------------------------------------------------------ source views
def view_sql(lay: Layout, dialect: str, rels: dict) -> dict:
    """SELECTs for the relations ``meas``, ``ev`` and (with periods) ``obs`` of a long layout.

    ``rels`` maps "meas", "events" and optionally "periods" to relation expressions of the
    engine (a table function or a registered view).
    """
    d = DIALECTS[dialect]
    q = d.q
    out = {"meas": f"SELECT * FROM {rels['meas']}",
           "ev": (f"SELECT CAST({q(lay.events_person)} AS STRING) AS person, "
                  f"{d.day(q(lay.events_date))} AS day, CAST({q(lay.events_code)} AS STRING) AS code "
                  f"FROM {rels['events']} WHERE {q(lay.events_date)} IS NOT NULL")}
    out.update(code_map(lay))
    if "periods" in rels:
        out["obs_rows"] = (f"SELECT CAST({q(lay.person)} AS STRING) AS person, "
                           f"{d.day(q(lay.period_start))} AS start_day, "
                           f"{d.day(q(lay.period_end))} AS end_day FROM {rels['periods']}")
        out["obs"] = merged_periods("SELECT person, start_day, end_day FROM obs_rows")
    return out


def period_check_sql() -> str:
    """Observation-period rows (view ``obs_rows``) that cannot count as observed time: (rows,
    rows missing a start or end date, rows ending before they start).  :func:`merged_periods`
    leaves both out; the scan says how many (``quality.period_warnings``)."""
    return ("SELECT count(*) AS n, "
            "sum(CASE WHEN start_day IS NULL OR end_day IS NULL THEN 1 ELSE 0 END) AS undated, "
            "sum(CASE WHEN end_day < start_day THEN 1 ELSE 0 END) AS reversed FROM obs_rows")


def merged_periods(periods: str) -> str:
    """Observed periods ``(person, start_day, end_day)`` with overlapping and abutting ones
    merged into one (a period starting the day after another ends continues it).

    Enrolment files often hold one row per month: unmerged, a window that crosses from one
    month into the next would read as "not observed".  Gaps and islands: a period opens a new
    island when it starts more than a day after every earlier period of the person has ended.
    Plain window functions, the same in DuckDB and Spark SQL.
    """
    return ("SELECT person, min(start_day) AS start_day, max(end_day) AS end_day FROM ("
            "SELECT person, start_day, end_day, sum(CASE WHEN prev_end IS NULL "
            "OR start_day > prev_end + 1 THEN 1 ELSE 0 END) OVER (PARTITION BY person "
            "ORDER BY start_day, end_day ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW) "
            "AS island FROM (SELECT person, start_day, end_day, max(end_day) OVER (PARTITION BY "
            "person ORDER BY start_day, end_day ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING) "
            f"AS prev_end FROM ({periods}) p0 WHERE end_day >= start_day) p1) p2 "
            "GROUP BY person, island")


FEMALE_CONCEPT = 8532      # OMOP gender concept "FEMALE" (from memory: OMOP standard vocabulary)
OMOP_TABLES = ("person", "measurement", "drug_exposure", "procedure_occurrence", "observation_period")


def omop_view_sql(lay: Layout, dialect: str, rels: dict) -> dict:
    """Views (with the uptake code map) for OMOP CDM v5.4 tables (``rels``: table → relation).

    * ``meas``: ``measurement`` rows with ``age`` (years at the measurement date, birth taken
      as the 1st of ``month_of_birth``, July when it is missing) and ``female``
      (``gender_concept_id`` = 8532; NULL when the gender concept is 0 or missing).
    * ``ev``: ``drug_exposure`` (start date, ``drug_concept_id``) and ``procedure_occurrence``
      (``procedure_date``, ``procedure_concept_id``) rows.
    * ``obs``: ``observation_period``.
    An uptake's concepts match themselves and, when ``concept_ancestor`` is present, every
    descendant concept.
    """
    d = DIALECTS[dialect]
    birth = "make_date(CAST(p.year_of_birth AS INT), CAST(coalesce(p.month_of_birth, 7) AS INT), 1)"
    meas = (f"SELECT m.person_id, m.measurement_date, m.measurement_concept_id, "
            f"CAST(m.value_as_number AS DOUBLE) AS value_as_number, "
            f"({d.day('m.measurement_date')} - {d.day(birth)}) / 365.25 AS age, "
            f"CASE WHEN p.gender_concept_id = {FEMALE_CONCEPT} THEN 1 "
            f"WHEN p.gender_concept_id IS NULL OR p.gender_concept_id = 0 THEN NULL ELSE 0 END AS female "
            f"FROM {rels['measurement']} m LEFT JOIN {rels['person']} p ON p.person_id = m.person_id")
    ev = (f"SELECT CAST(person_id AS STRING) AS person, {d.day('drug_exposure_start_date')} AS day, "
          f"CAST(drug_concept_id AS STRING) AS code FROM {rels['drug_exposure']} "
          f"WHERE drug_exposure_start_date IS NOT NULL")
    if "procedure_occurrence" in rels:
        ev += (f" UNION ALL SELECT CAST(person_id AS STRING) AS person, {d.day('procedure_date')} AS day, "
               f"CAST(procedure_concept_id AS STRING) AS code FROM {rels['procedure_occurrence']} "
               f"WHERE procedure_date IS NOT NULL")
    obs_rows = (f"SELECT CAST(person_id AS STRING) AS person, "
                f"{d.day('observation_period_start_date')} AS start_day, "
                f"{d.day('observation_period_end_date')} AS end_day "
                f"FROM {rels['observation_period']}")
    obs = merged_periods("SELECT person, start_day, end_day FROM obs_rows")
    own = " UNION ALL ".join(f"SELECT {j} AS j, {int(c)} AS concept"
                             for j, u in enumerate(lay.uptakes) for c in u.concepts)
    uc = f"SELECT j, CAST(concept AS STRING) AS code FROM ({own}) o"
    if "concept_ancestor" in rels:
        uc = (f"SELECT DISTINCT j, code FROM ({uc} UNION ALL SELECT o.j, "
              f"CAST(a.descendant_concept_id AS STRING) AS code FROM ({own}) o "
              f"JOIN {rels['concept_ancestor']} a ON a.ancestor_concept_id = o.concept) z")
    return {"meas": meas, "ev": ev, "obs_rows": obs_rows, "obs": obs, "uc": uc,
            "ucp": code_map(lay)["ucp"]}



def dropped_sql(lay: Layout, table: str = "analysis", dialect: str = "duckdb") -> str:
    """One aggregate over the analysis rows: per running variable, the rows dropped whole and,
    per uptake, those with earlier use and those whose window was not observed."""
    return f"SELECT {', '.join(dropped_parts(lay, dialect))} FROM {table} GROUP BY _score ORDER BY _score"


def dropped_parts(lay: Layout, dialect: str = "duckdb") -> list[str]:
    """The select list of :func:`dropped_sql` (score, rows, rows dropped whole, then per uptake
    earlier use and unobserved window)."""
    parts = ["_score", "count(*) AS n", "sum(_noobs) AS noobs"]
    for j in range(len(lay.uptakes)):
        prior, unseen, _ = uptake_parts(lay, j, dialect)
        parts += [f"sum(CASE WHEN _noobs = 0 AND {prior} THEN 1 ELSE 0 END) AS p{j}",
                  f"sum(CASE WHEN _noobs = 0 AND NOT ({prior}) AND {unseen} THEN 1 ELSE 0 END) AS w{j}"]
    return parts


def dropped_entries(lay: Layout, rows) -> list[dict]:
    """``data.dropped`` entries from the rows of :func:`dropped_sql`."""
    out = []
    for r in rows:
        name = lay.scores[int(r[0])].name
        if r[2]:
            out.append({"column": name, "treatment": None, "reason": "window not observed",
                        "rows": int(r[2])})
        for j, u in enumerate(lay.uptakes):
            for k, reason in ((3 + 2 * j, "treated before"), (4 + 2 * j, "window not observed")):
                if r[k]:
                    out.append({"column": name, "treatment": u.name, "reason": reason, "rows": int(r[k])})
    return out
