"""Running the analysis-row SQL in DuckDB (the embedded default for long-format registries).

DuckDB reads the Parquet, CSV or DuckDB-file sources out of core, with a memory limit, and
keeps the analysis rows in a temporary table; the scan then streams them in Arrow batches
through the usual binning pass.  Drop counts are one aggregate query over the same table.
"""
from __future__ import annotations

import tempfile

import numpy as np
from pathlib import Path

from ..errors import InputError
from .layout import Layout
from .sql import (DIALECTS, analysis_steps, dropped_entries, dropped_sql, literal, period_check_sql,
                  scan_sql, view_sql)

MEMORY_LIMIT = "1GB"       # DuckDB spills to disk above this; keeps the whole scan near 2 GB


def _relation(path: Path, what: str) -> str:
    """A DuckDB table function reading ``path`` (Parquet file or folder, CSV)."""
    if not path.exists():
        raise InputError(f"{path}: {what} file not found. Check the spec (paths are relative "
                         "to the spec file).")
    p = str(path).replace("'", "''")
    if path.is_dir():
        if any(path.rglob("*.parquet")):
            return f"read_parquet('{p}/**/*.parquet')"
        if any(path.rglob("*.csv")):
            return f"read_csv('{p}/**/*.csv', header = true)"
        raise InputError(f"{path}: folder holds no .parquet or .csv files ({what}).")
    suf = "".join(path.suffixes).lower()
    if suf.endswith((".parquet", ".pq")):
        return f"read_parquet('{p}')"
    if suf.endswith((".csv", ".csv.gz", ".tsv", ".txt")):
        return f"read_csv('{p}', header = true)"
    raise InputError(f"{path}: {what} must be a .parquet or .csv file (or a folder of them).")


def _columns(con, rel: str) -> list[str]:
    return [r[0] for r in con.execute(f"DESCRIBE SELECT * FROM {rel}").fetchall()]


def _require(con, rel: str, cols, name: str, keys: str) -> None:
    from ..errors import ColumnNotFoundError
    have = _columns(con, rel)
    for c in cols:
        if c not in have:
            raise ColumnNotFoundError(c, have, name, keys)


class Registry:
    """A DuckDB connection holding one long-format registry's relations and analysis rows."""

    def __init__(self, lay: Layout, base: Path, data: dict | None = None, build: bool = True):
        import duckdb
        self.lay = lay
        self._counts: dict = {}
        self._tmp = tempfile.TemporaryDirectory(prefix="cutscan-duckdb-")
        # A database file in a private temporary folder: the analysis rows may exceed memory,
        # and every batch reader gets its own cursor on the same database.
        self.con = duckdb.connect(str(Path(self._tmp.name) / "registry.duckdb"))
        self.con.execute(f"SET memory_limit = '{MEMORY_LIMIT}'")
        self.con.execute(f"SET temp_directory = '{self._tmp.name}'")
        self.con.execute("SET preserve_insertion_order = false")
        self.name = str(base)
        if lay.omop:
            from .omop import register_omop
            register_omop(self.con, lay, base / lay.omop)
            self.name = str(base / lay.omop)
        else:
            self._register_files(base, data or {})
        self._q = DIALECTS["duckdb"].q
        if build:
            self.build()

    def build(self) -> None:
        """Create the analysis rows (a table in the private database).

        Each step of the query is a table of its own: every join and aggregate then has the
        whole memory limit and spills on its own, where one large query would hold several
        join tables at once."""
        import duckdb
        steps, final = analysis_steps(self.lay, "duckdb")
        name = "idx"
        try:
            for name, sel in steps:
                self.con.execute(f"CREATE TABLE {name} AS {sel}")
            name = "analysis"
            self.con.execute("CREATE TABLE analysis AS " + final)
        except duckdb.ConversionException as e:
            raise self._unreadable(e, name) from None
        for name, _ in reversed(steps):
            self.con.execute(f"DROP TABLE {name}")
        self.columns = [self.lay.person, self.lay.date] + [s.name for s in self.lay.scores] + \
            list(self.lay.treatments) + list(self.lay.covariates)
        self.num_rows = self.con.execute("SELECT count(*) FROM analysis WHERE _noobs = 0").fetchone()[0]

    def _unreadable(self, e, step: str = "idx") -> InputError:
        """A value or date the registry could not convert (text such as '<5' in a value
        column): the file and the columns of the step that read it, and the fix."""
        lay = self.lay
        detail = str(e).splitlines()[0] if str(e) else type(e).__name__
        fix = ("Clean the column before the scan: text codes such as '<5' must become a number "
               "or an empty cell (missing); the long layout casts these columns in the database, "
               "before any spec cleaning can map codes.")
        omop = Path(self.name) if lay.omop else None
        if step in ("evj", "hl", "hits"):
            if omop is not None:     # the OMOP tables and their own date columns (sql.py)
                src = f"{omop / 'drug_exposure'} or {omop / 'procedure_occurrence'}"
                cols = "drug_exposure_start_date and procedure_date"
            else:
                src, cols = lay.events_source or "events", lay.events_date or "date"
            return InputError(f"{src}: a value could not be read as a date ({detail}). "
                              f"Column(s) {cols} must hold dates. {fix}")
        if step == "cov":
            if omop is not None:
                src = str(omop / "observation_period")
                cols = "observation_period_start_date and observation_period_end_date"
            else:
                src = lay.periods or "observation periods"
                cols = f"{lay.period_start} and {lay.period_end}"
            return InputError(f"{src}: a value could not be read as a date ({detail}). Columns "
                              f"{cols} must hold dates. {fix}")
        src = lay.source or (str(Path(self.name) / "measurement") if lay.omop else "measurements")
        vals = ", ".join(dict.fromkeys(s.column for s in lay.scores))
        return InputError(
            f"{src}: a value could not be read as a number or date ({detail}). Value column(s) "
            f"{vals} must hold numbers and {lay.date} dates (the events file's "
            f"{lay.events_date or 'date'} and the periods' dates are read later). {fix}")

    def _register_files(self, base: Path, data: dict) -> None:
        lay, con = self.lay, self.con
        srcs = {"meas": lay.source, "events": lay.events_source, "periods": lay.periods}
        rels = {}
        for key, src in srcs.items():
            if key in data:
                con.register(f"_{key}_df", data[key])
                rels[key] = f"_{key}_df"
            elif src:
                p = Path(src)
                rels[key] = _relation(p if p.is_absolute() else base / p,
                                      {"meas": "data.source", "events": "events.source",
                                       "periods": "data.periods"}[key])
        wanted = [lay.person, lay.date] + [s.column for s in lay.scores] + \
            [k for s in lay.scores for k, _ in s.where] + list(lay.covariates) + \
            ([lay.screen.test, lay.screen.value] if lay.screen else [])
        _require(con, rels["meas"], dict.fromkeys(wanted), srcs["meas"] or "measurements",
                 "long-format measurement")
        _require(con, rels["events"], [lay.events_person, lay.events_date, lay.events_code],
                 srcs["events"] or "events", "events")
        if "periods" in rels:
            _require(con, rels["periods"], [lay.person, lay.period_start, lay.period_end],
                     srcs["periods"] or "periods", "observed-time")
        for name, sel in view_sql(lay, "duckdb", rels).items():
            con.execute(f"CREATE VIEW {name} AS {sel}")

    per_score = None    # the data-quality profile: at most this many rows of each running variable

    def batches(self, cols, rows):
        """The kept analysis rows (columns ``cols``) as Arrow record batches, in a fixed order."""
        source = "analysis"
        if self.per_score is not None:
            # The first rows of every running variable (rows come ordered by variable, so the
            # first rows of the table would hold the first variable only).
            source = ("(SELECT * FROM analysis WHERE _noobs = 0 QUALIFY row_number() OVER "
                      f"(PARTITION BY _score ORDER BY _person, _day) <= {int(self.per_score)}) a")
        sql = scan_sql(self.lay, "duckdb", source, cols)
        reader = self.con.cursor().sql(sql).to_arrow_reader(rows)
        yield from reader

    def bin(self, table, plan):
        """The binning pass inside DuckDB (:mod:`scanner.events.bins_sql`): only per-bin sums
        leave the database.  ``table`` is the cleaned scan table over this registry; its
        data-quality profile (the first rows of the scan order, the running variables and
        covariates only) is read first, as the streaming pass would, and its cleaning then runs
        as SQL.  None when the plan needs the streaming pass (joint pair sums, unit columns)."""
        from .bins_sql import bin_registry
        cl = getattr(table, "cleaning", None)
        if cl is not None and (cl.units or cl.value_maps or cl.decimal):
            return None
        if cl is not None and cl.planner is not None and not cl.planned:
            self._profile(table, cl)
        return bin_registry(lambda sql: self.con.execute(sql).fetchnumpy(), self.lay, plan, cl,
                            "duckdb", "analysis", self._counts)

    def _profile(self, table, cl) -> None:
        """Run the cleaning's profile on the first rows of every running variable (an equal share
        of ``cl.profile_rows``), leaving its counters as they were (the aggregate query counts
        every row)."""
        import copy
        names = ("coded", "mapped", "sentinel_hits", "converted", "unit_missing", "out_of_range",
                 "watched")
        saved = {n: copy.deepcopy(getattr(cl, n)) for n in names}
        # Every running variable gets its share of the profile: the rows come in the order
        # (score, person, day), so the first profile_rows rows would all be the first one's.
        self.per_score = -(-cl.profile_rows // max(len(self.lay.scores), 1))
        try:
            it = table.batches(list(cl.profile_columns), cl.profile_rows)
            next(it, None)
            it.close()
            if not cl.planned:          # no rows at all
                cl.planned = True
                cl.planner({c: np.zeros(0) for c in cl.profile_columns})
        finally:
            self.per_score = None
            for n, v in saved.items():
                d = getattr(cl, n)
                d.clear()
                d.update(v)

    def dropped(self) -> list[dict]:
        """Rows left out, per running variable (and uptake): ``data.dropped`` entries (counted
        by the binning aggregate when it ran)."""
        rows = self._counts.get("dropped_rows")
        if rows is None:
            rows = self.con.execute(dropped_sql(self.lay)).fetchall()
        return dropped_entries(self.lay, rows)

    def period_problems(self) -> dict | None:
        """Observation-period rows left out of observed time (``sql.period_check_sql``), with
        the file they come from; None without observation periods."""
        lay = self.lay
        if not (lay.periods or lay.omop):
            return None
        n, undated, reversed_ = self.con.execute(period_check_sql()).fetchone()
        src = (str(Path(self.name) / "observation_period") if lay.omop
               else lay.periods or "observation periods")
        return {"source": src, "rows": int(n or 0), "undated": int(undated or 0),
                "reversed": int(reversed_ or 0)}

    def index_rows(self) -> dict:
        """Index rows per running variable (before observed-time drops)."""
        res = self.con.execute("SELECT _score, count(*) FROM analysis GROUP BY _score").fetchall()
        return {self.lay.scores[s].name: int(n) for s, n in sorted(res)}

    def close(self) -> None:
        self.con.close()
        self._tmp.cleanup()


__all__ = ["Registry", "literal"]
