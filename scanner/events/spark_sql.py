"""The analysis-row SQL of a long-format registry run as Spark SQL (``data.engine = "spark"``).

The query text is the one DuckDB runs (scanner.events.sql, Spark dialect); the result stays a
Spark DataFrame and goes straight into the Spark binning pass, so only bins leave the cluster.
"""
from __future__ import annotations

from pathlib import Path

from ..errors import ColumnNotFoundError, InputError
from .sql import (OMOP_TABLES, analysis_sql, scan_sql, dropped_entries, dropped_sql, omop_view_sql,
                  period_check_sql, view_sql)


def _read(spark, path: Path, what: str):
    if not path.exists():
        raise InputError(f"{path}: {what} file not found. Check the spec (paths are relative "
                         "to the spec file).")
    name = path.name.lower()
    if path.is_dir() or name.endswith((".parquet", ".pq")):
        return spark.read.parquet(str(path))
    if name.endswith((".csv", ".csv.gz", ".txt", ".tsv")):
        return spark.read.csv(str(path), header=True, inferSchema=True)
    raise InputError(f"{path}: {what} must be Parquet or CSV for the Spark engine.")


class SparkRegistry:
    """Analysis rows of a long-format layout as a cached Spark DataFrame (``frame``)."""

    def __init__(self, spark, lay, base: Path, data: dict | None = None):
        self.spark, self.lay = spark, lay
        data = data or {}
        rels = {}
        if lay.omop:
            folder = base / lay.omop
            for t in OMOP_TABLES + ("concept_ancestor",):
                for cand in (folder / f"{t}.parquet", folder / f"{t}.csv", folder / t):
                    if cand.exists():
                        _read(spark, cand, f"OMOP table {t}").createOrReplaceTempView(f"_cdm_{t}")
                        rels[t] = f"_cdm_{t}"
                        break
            views = omop_view_sql(lay, "spark", rels)
        else:
            srcs = {"meas": lay.source, "events": lay.events_source, "periods": lay.periods}
            for key, src in srcs.items():
                if key in data:
                    df = data[key]
                    df = df if type(df).__module__.startswith("pyspark") else spark.createDataFrame(df)
                elif src:
                    p = Path(src)
                    df = _read(spark, p if p.is_absolute() else base / p, key)
                else:
                    continue
                need = {"meas": [lay.person, lay.date] + [s.column for s in lay.scores],
                        "events": [lay.events_person, lay.events_date, lay.events_code],
                        "periods": [lay.person, lay.period_start, lay.period_end]}[key]
                for c in need:
                    if c not in df.columns:
                        raise ColumnNotFoundError(c, list(df.columns), src or key, key)
                df.createOrReplaceTempView(f"_src_{key}")
                rels[key] = f"_src_{key}"
            views = view_sql(lay, "spark", rels)
        for name, sel in views.items():
            spark.sql(sel).createOrReplaceTempView(name)
        self.all = spark.sql(analysis_sql(lay, "spark")).cache()
        self.all.createOrReplaceTempView("_analysis")
        self.frame = spark.sql(scan_sql(lay, "spark", "_analysis"))

    def dropped(self) -> list[dict]:
        rows = [tuple(r) for r in self.spark.sql(dropped_sql(self.lay, "_analysis", "spark")).collect()]
        return dropped_entries(self.lay, rows)

    def period_problems(self) -> dict | None:
        """As the DuckDB registry's: observation-period rows left out of observed time."""
        lay = self.lay
        if not (lay.periods or lay.omop):
            return None
        n, undated, reversed_ = tuple(self.spark.sql(period_check_sql()).collect()[0])
        src = "observation_period" if lay.omop else (lay.periods or "observation periods")
        return {"source": src, "rows": int(n or 0), "undated": int(undated or 0),
                "reversed": int(reversed_ or 0)}

    def index_rows(self) -> dict:
        rows = self.spark.sql("SELECT _score, count(*) FROM _analysis GROUP BY _score").collect()
        return {self.lay.scores[int(s)].name: int(n) for s, n in sorted(tuple(r) for r in rows)}

    def close(self) -> None:
        self.all.unpersist()
