"""Per-bin sums of the analysis rows computed inside the database engine (GROUP BY).

The analysis rows of a long-format registry never leave the engine: one aggregate query groups
them by (running variable, bin key, period, half) and only those sums reach Python, where they
become the same :class:`~scanner.bins.BinnedStats` the streaming pass would build.

Which bins.  The grid rule is the local engine's (:mod:`scanner.engines.grid`), applied to the
set of values, as the Spark engine does: a running variable with at most ``plan.fine_keys``
distinct values is grouped by exact value; any other is grouped on the finest power-of-ten grid
that holds at most ``plan.fine_keys`` bins, with keys computed by the same double operations
(``floor(x/w)`` corrected against the exact-decimal edges ``(k·p)/10^d``) and split at the forced
edges (part ``j`` of grid bin ``k`` has key ``k + j/SUB``).  The settling step — exact bins up to
``plan.max_exact`` values, else the final 1-2-5 width and round-number edges — then runs
unchanged in :meth:`scanner.engines.accumulate.Accumulator.finish`.

Cleaning.  Declared missing codes, the data-quality profile's sentinel values and other-unit
ranges (:mod:`scanner.cleaning`, :mod:`scanner.quality`) become ``CASE`` expressions, and their
counts are one aggregate query, so the bins equal those of cleaning the rows in Python.

Halves.  The held-out half of a person is the parity of the last hex digit of
``md5('<seed>:<person>')`` (:func:`person_half`): every index row of a person falls in the same
half, whatever the row order, and the function exists in DuckDB and Spark SQL alike.

Only portable SQL is used (``floor``, ``CASE``, ``count``, ``sum``, ``md5``, ``year``,
``quarter``, ``isnan``), so the same text serves both dialects (:data:`scanner.events.sql.DIALECTS`).
"""
from __future__ import annotations

import hashlib

import numpy as np

from ..engines import grid
from .sql import DIALECTS

ODD_HEX = ("1", "3", "5", "7", "9", "b", "d", "f")


def person_half(person: str, seed: int) -> int:
    """The half (0/1) of a person: parity of the last hex digit of md5('<seed>:<person>')."""
    return int(hashlib.md5(f"{seed}:{person}".encode()).hexdigest()[-1] in ODD_HEX)


def _num(v: float) -> str:
    """A double literal both dialects read as exactly ``v`` (bare decimals are DECIMAL there)."""
    v = float(v)
    if np.isinf(v):
        return f"CAST('{'-' if v < 0 else ''}Infinity' AS DOUBLE)"
    return f"CAST({v!r} AS DOUBLE)"


def _finite(e: str) -> str:
    return f"({e} IS NOT NULL AND NOT isnan({e}) AND abs({e}) <> CAST('Infinity' AS DOUBLE))"


def _nan(e: str) -> str:
    return f"({e} IS NULL OR isnan({e}))"


class Cleaner:
    """The cleaning steps of one column as SQL: codes, then sentinels, then the kept range.

    Mirrors :func:`scanner.cleaning._parse` and :func:`scanner.cleaning._after_profile` for a
    numeric column (the only kind the analysis table holds).
    """

    def __init__(self, name: str, cl):
        from ..parsing import split_codes
        self.name = name
        self.codes = sorted(split_codes(cl.codes.get(name, ()))[1]) if cl is not None else []
        self.sent = sorted(cl.sentinels.get(name, ())) if cl is not None else []
        self.watch = sorted(cl.watch.get(name, ())) if cl is not None else []
        self.range = cl.keep_range.get(name) if cl is not None else None

    @staticmethod
    def _in(e: str, vals) -> str:
        return f"{e} IN ({', '.join(_num(v) for v in vals)})"

    def stages(self, e: str) -> tuple[str, str, str]:
        """(after codes, after sentinels, after the kept range) as expressions of ``e``."""
        a = f"CASE WHEN {self._in(e, self.codes)} THEN NULL ELSE {e} END" if self.codes else e
        b = f"CASE WHEN {self._in(a, self.sent)} THEN NULL ELSE {a} END" if self.sent else a
        c = f"CASE WHEN {self._out(b)} THEN NULL ELSE {b} END" if self.range is not None else b
        return a, b, c

    def _out(self, b: str) -> str:
        lo, hi = self.range
        return f"(NOT {_nan(b)} AND ({b} < {_num(lo)} OR {b} > {_num(hi)}))"

    def counts(self, e: str, tag: str) -> list[tuple[str, str]]:
        """(alias, aggregate) pairs counting what each step did over the rows."""
        a, b, _ = self.stages(e)
        out = []
        if self.codes:
            out.append((f"{tag}_coded", f"sum(CASE WHEN {self._in(e, self.codes)} THEN 1 ELSE 0 END)"))
        for i, v in enumerate(self.watch):
            out.append((f"{tag}_w{i}", f"sum(CASE WHEN {a} = {_num(v)} THEN 1 ELSE 0 END)"))
        for i, v in enumerate(self.sent):
            out.append((f"{tag}_s{i}", f"sum(CASE WHEN {a} = {_num(v)} THEN 1 ELSE 0 END)"))
        if self.range is not None:
            out.append((f"{tag}_oor", f"sum(CASE WHEN {self._out(b)} THEN 1 ELSE 0 END)"))
        return out

    def record(self, cl, got: dict, tag: str) -> None:
        """Add the counts of :meth:`counts` to the cleaning's counters."""
        if cl is None:
            return
        if self.codes:
            cl.coded[self.name] = cl.coded.get(self.name, 0) + int(got[f"{tag}_coded"] or 0)
        for i, v in enumerate(self.watch):
            t = cl.watched.setdefault(self.name, {})
            t[v] = t.get(v, 0) + int(got[f"{tag}_w{i}"] or 0)
        for i, v in enumerate(self.sent):
            k = int(got[f"{tag}_s{i}"] or 0)
            if k:
                t = cl.sentinel_hits.setdefault(self.name, {})
                t[float(v)] = t.get(float(v), 0) + k
        if self.range is not None:
            cl.out_of_range[self.name] = cl.out_of_range.get(self.name, 0) + int(got[f"{tag}_oor"] or 0)


def column_exprs(lay, dialect: str) -> dict:
    """Raw SQL value of each analysis column the scan tracks (uptakes 0/1/NULL, covariates)."""
    q = DIALECTS[dialect].q
    from .sql import uptake_value
    out = {u.name: uptake_value(lay, j, dialect) for j, u in enumerate(lay.uptakes)}
    out.update({c: f"CAST({q(c)} AS DOUBLE)" for c in lay.covariates})
    return out


def counts_sql(lay, plan, cl, dialect: str, table: str) -> tuple[str, list]:
    """One aggregate per running variable over all its rows: the drop counts of
    :func:`scanner.events.sql.dropped_sql`, and among the kept rows the missing and infinite
    values after cleaning and what each cleaning step did (codes, sentinels, range)."""
    from .sql import dropped_parts
    cols = column_exprs(lay, dialect)
    parts, cleaners, xs = dropped_parts(lay, dialect), [], []
    for k, s in enumerate(lay.scores):
        if s.name not in plan.running:
            continue
        cr = Cleaner(s.name, cl)
        xs.append(f"WHEN {k} THEN {cr.stages('_x')[2]}")
        x = f"(CASE WHEN _noobs = 0 AND _score = {k} THEN _x END)"
        parts += [f"{agg} AS {alias}" for alias, agg in cr.counts(x, f"r{k}")]
        cleaners.append((cr, f"r{k}"))
    v = f"(CASE _score {' '.join(xs)} END)" if xs else "CAST(NULL AS DOUBLE)"
    parts += [f"sum(CASE WHEN _noobs = 0 AND {_nan(v)} THEN 1 ELSE 0 END) AS nan",
              f"sum(CASE WHEN _noobs = 0 AND NOT {_nan(v)} AND abs({v}) = "
              f"CAST('Infinity' AS DOUBLE) THEN 1 ELSE 0 END) AS inf"]
    for i, c in enumerate(plan.columns):
        if c in cols:
            cr = Cleaner(c, cl)
            e = f"(CASE WHEN _noobs = 0 THEN {cols[c]} END)"
            parts += [f"{agg} AS {alias}" for alias, agg in cr.counts(e, f"c{i}")]
            cleaners.append((cr, f"c{i}"))
    return f"SELECT {', '.join(parts)} FROM {table} GROUP BY _score ORDER BY _score", cleaners


def _period(lay, plan, dialect: str) -> str:
    d = DIALECTS[dialect]
    if not plan.date:
        return "-1"
    date = d.from_day("_day")
    quarter = f"(year({date}) * 4 + quarter({date}) - 1)"
    whens = []
    for k, s in enumerate(lay.scores):
        detail = plan.period_of(s.name)
        if detail == "quarter":
            whens.append(f"WHEN {k} THEN {quarter}")
        elif detail == "year":
            whens.append(f"WHEN {k} THEN year({date}) * 4")
    return f"CAST(CASE _score {' '.join(whens)} ELSE -1 END AS INT)" if whens else "-1"


def _half(plan) -> str:
    if plan.split_seed is None:
        return "-1"
    odd = ", ".join(f"'{h}'" for h in ODD_HEX)
    return (f"CASE WHEN substr(md5(concat('{int(plan.split_seed)}:', _person)), 32, 1) IN ({odd}) "
            "THEN 1 ELSE 0 END")


def rows_sql(lay, plan, cl, dialect: str, table: str) -> str:
    """The kept rows of the running variables in ``plan``: score, cleaned finite x, period,
    half and the cleaned tracked columns ``c0, c1, ...`` (NaN and ±inf are NULL)."""
    cols = column_exprs(lay, dialect)
    xs = " ".join(f"WHEN {k} THEN {Cleaner(s.name, cl).stages('_x')[2]}"
                  for k, s in enumerate(lay.scores) if s.name in plan.running)
    ks = ", ".join(str(k) for k, s in enumerate(lay.scores) if s.name in plan.running)
    sel = ["_score AS s", f"CASE _score {xs} END AS x", f"{_period(lay, plan, dialect)} AS period",
           f"{_half(plan)} AS half"]
    for i, c in enumerate(plan.columns):
        cr = Cleaner(c, cl)
        v = cr.stages(cols[c])[2]
        plain = c in lay.treatments and not (cr.codes or cr.sent or cr.range)
        sel.append(f"{v} AS c{i}" if plain else f"CASE WHEN {_finite(v)} THEN {v} END AS c{i}")
    inner = f"SELECT {', '.join(sel)} FROM {table} WHERE _noobs = 0 AND _score IN ({ks})"
    return f"SELECT * FROM ({inner}) r0 WHERE {_finite('x')}"


def distinct_sql(rows: str) -> str:
    """Distinct values and the largest |x| per running variable."""
    return f"SELECT s, count(DISTINCT x), max(abs(x)) FROM ({rows}) r GROUP BY s"


def _keys_expr(x: str, p: float, d: int) -> str:
    """:func:`scanner.engines.grid.keys` in SQL: the same double operations, as a BIGINT."""
    w = grid.width_of(p, d)

    def edge(k):
        return f"(({k}) * {_num(p)}) / {_num(10.0 ** d)}" if d > 0 else f"({k}) * {_num(p * 10.0 ** (-d))}"
    k0 = f"floor({x} / {_num(w)})"
    k1 = f"({k0} - CASE WHEN {edge(k0)} > {x} THEN 1 ELSE 0 END)"
    return f"CAST({k1} + CASE WHEN {edge(k1 + ' + 1')} <= {x} THEN 1 ELSE 0 END AS BIGINT)"


def occupancy_sql(rows: str, k: int, levels) -> str:
    """Occupied power-of-ten bins of running variable ``k`` at each level (over distinct values)."""
    vals = f"SELECT DISTINCT x FROM ({rows}) r WHERE s = {k}"
    cnt = ", ".join(f"count(DISTINCT {_keys_expr('x', *grid.power_grid(lv))})" for lv in levels)
    return f"SELECT {cnt} FROM ({vals}) v"


def key_expr(grid_pd, forced, name: str = "") -> str:
    """Bin key of a row: grid key ``k`` plus ``j/SUB`` for part ``j`` of a bin split at forced edges."""
    p, d = grid_pd
    k = _keys_expr("x", p, d)
    kk, v, rc = grid.inner(forced, p, d, name)
    if kk.size == 0:
        return f"CAST({k} AS DOUBLE)"
    parts = " + ".join(f"CASE WHEN k = {int(b)} AND x {'>=' if r else '>'} {_num(e)} THEN 1 ELSE 0 END"
                       for b, e, r in zip(kk, v, rc))
    return f"CAST(k AS DOUBLE) + ({parts}) / {_num(grid.SUB)}", k


def bins_sql(rows: str, keys: dict, n_cols: int, binary=()) -> str:
    """GROUP BY (running variable, key, period, half) with the sums of BinnedStats.

    ``keys`` maps a running variable's number to its key expression (``"x"`` for exact bins, or
    :func:`key_expr`); columns numbered in ``binary`` are 0/1, so their Σy² is their Σy and is
    not summed.
    """
    whens, ks = [], []
    for k, e in keys.items():
        if isinstance(e, tuple):            # split bins: the grid key first, then its part
            expr, gk = e
            ks.append(f"WHEN {k} THEN {gk}")
            whens.append(f"WHEN {k} THEN {expr}")
        else:
            whens.append(f"WHEN {k} THEN {e}")
    kcol = f", CASE s {' '.join(ks)} ELSE 0 END AS k" if ks else ", 0 AS k"
    keyed = f"SELECT *{kcol} FROM ({rows}) r"
    aggs = ["count(*) AS n", "sum(x) AS sx", "sum(x * x) AS sxx"]
    for i in range(n_cols):
        aggs += [f"count(c{i}) AS cnt_{i}", f"coalesce(sum(c{i}), 0) AS s1_{i}"]
        if i not in binary:
            aggs.append(f"coalesce(sum(c{i} * c{i}), 0) AS s2_{i}")
    return (f"SELECT s, key, period, half, {', '.join(aggs)} FROM ("
            f"SELECT *, CASE s {' '.join(whens)} END AS key FROM ({keyed}) r1) r2 "
            "GROUP BY s, key, period, half")


def stats_from(arrays: dict, template, n_cols: int):
    """BinnedStats (layout of ``template``) from the columns of :func:`bins_sql` for one running
    variable, bins sorted by (key, period, half)."""
    from dataclasses import replace
    key = np.asarray(arrays["key"], float)
    period = np.asarray(arrays["period"], np.int32)
    half = np.asarray(arrays["half"], np.int8)
    order = np.lexsort((half, period, key))

    def col(name, dtype=float):
        return np.asarray(arrays[name], dtype)[order]

    def mat(prefix, dtype=float):
        if n_cols == 0:
            return np.zeros((key.size, 0), dtype)
        return np.column_stack([col(f"{prefix}_{i}" if f"{prefix}_{i}" in arrays else f"s1_{i}", dtype)
                                for i in range(n_cols)])         # a 0/1 column: Σy² = Σy
    return replace(template, key=key[order], period=period[order], half=half[order],
                   n=col("n", np.int64), sx=col("sx"), sxx=col("sxx"), cnt=mat("cnt", np.int64),
                   s1=mat("s1"), s2=mat("s2"), pn=None)   # no pairs: sized by __post_init__


def bin_registry(con_query, lay, plan, cl, dialect: str, table: str, keep: dict | None = None):
    """The binning pass of :mod:`scanner.engines` over the analysis rows, inside the engine.

    ``con_query(sql)`` runs a query and returns its result as a dict of numpy columns.  Returns a
    :class:`~scanner.engines.plan.BinResult`, or None when the plan needs what this path does
    not compute (joint pair sums).  ``keep`` receives ``dropped_rows`` (the rows of
    :func:`scanner.events.sql.dropped_sql`, from the same aggregate).
    """
    from ..bins import BinnedStats
    from ..engines.accumulate import Accumulator
    from ..engines.plan import BinResult
    if plan.pairs:
        return None
    sql_counts, cleaners = counts_sql(lay, plan, cl, dialect, table)
    per = con_query(sql_counts)
    if keep is not None:
        width = 3 + 2 * len(lay.uptakes)
        names = list(per)[:width]
        keep["dropped_rows"] = [tuple(per[c][i] for c in names) for i in range(len(per["_score"]))]
    got = {k: np.nansum(np.asarray(v, float)) for k, v in per.items() if k != "_score"}
    for cr, tag in cleaners:
        cr.record(cl, got, tag)
    own = dict.fromkeys(range(len(lay.scores)), 0)
    own.update({int(k): int(n - m) for k, n, m in zip(per["_score"], per["n"], per["noobs"])})
    nan = dict(zip(map(int, per["_score"]), map(int, per["nan"])))
    inf = dict(zip(map(int, per["_score"]), map(int, per["inf"])))
    rows = rows_sql(lay, plan, cl, dialect, table)
    number = {s.name: k for k, s in enumerate(lay.scores)}
    dist = con_query(distinct_sql(rows))
    distinct = {int(s): (int(n), float(b)) for s, n, b in zip(dist["s"], *list(dist.values())[1:])}
    accs, keys = {}, {}
    for r in plan.running:
        k = number[r]
        acc = accs[r] = Accumulator(r, plan)
        if k not in distinct:
            continue
        n, big = distinct[k]
        if acc.state == "user":
            keys[k] = key_expr(acc.grid, acc.forced, acc.template.running)
        elif n <= plan.fine_keys:
            keys[k] = "x"
        else:
            # Finest power-of-ten level with at most fine_keys occupied bins (the level the
            # local engine coarsens to, as in scanner.engines.spark).
            e = grid.top_level(np.array([big]))
            while True:
                levels = list(range(e, e - 6, -1))
                occ = list(con_query(occupancy_sql(rows, k, levels)).values())
                over = [lv for lv, o in zip(levels, occ) if int(o[0]) > plan.fine_keys]
                if over or e < -grid.MAX_DECIMALS:
                    break
                e -= 6
            acc.level = (over[0] if over else e) + 1
            acc.state, acc.grid = "fine", grid.power_grid(acc.level)
            keys[k] = key_expr(acc.grid, acc.forced, acc.template.running)
            acc.stats = BinnedStats.empty(r, plan.columns, plan.pairs, "width",
                                          grid.width_of(*acc.grid), 0.0, acc.forced)
    stats = {}
    if keys:
        binary = {i for i, c in enumerate(plan.columns) if c in lay.treatments}
        res = con_query(bins_sql(rows, keys, len(plan.columns), binary))
        s = np.asarray(res["s"], np.int64)
        for r in plan.running:
            k = number[r]
            sel = s == k
            if sel.any():
                part = {c: np.asarray(v)[sel] for c, v in res.items()}
                accs[r].stats = stats_from(part, accs[r].template, len(plan.columns))
    for r in plan.running:
        stats[r] = accs[r].finish().validate()
    rows_read = sum(own.values())
    missing = {r: rows_read - own[number[r]] + nan.get(number[r], 0) for r in plan.running}
    nonfinite = {r: inf.get(number[r], 0) for r in plan.running}
    return BinResult(stats, rows_read, missing, nonfinite)
