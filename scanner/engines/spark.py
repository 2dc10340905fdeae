"""Spark engine: the binning pass as Spark group-bys with sum aggregations.

Only per-bin sums travel to the driver; everything after that is the unchanged local code.
The grid follows the same rule as the local engine (:mod:`scanner.engines.grid`), so both give
the same BinnedStats: bins are first grouped by exact value on the cluster; a variable with at
most ``plan.fine_keys`` distinct values is collected as exact bins, any other is regrouped on the
cluster onto the finest power-of-ten grid with at most ``plan.fine_keys`` bins (bin keys computed
with the same exact-decimal edges, in the same double arithmetic) and collected from there.
The driver then settles the final width exactly as the local engine does.

The library never starts Spark: pass a Spark DataFrame to :func:`scanner.scan`, or set
``data.engine = "spark"`` with an active SparkSession.  The ``cutscan`` command starts a
``local[2]`` session when a spec asks for the Spark engine (:func:`local_session`).
pyspark is imported only here.
"""
from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np

from ..bins import BinnedStats
from ..errors import ColumnNotFoundError, InputError
from . import grid
from .local import Accumulator
from .plan import BinPlan, BinResult

_SUMS = ("n", "sx", "sxx")


def require_java() -> str:
    """Path of the ``java`` Spark will use; a clear error when there is none."""
    home = os.environ.get("JAVA_HOME")
    java = str(Path(home) / "bin" / "java") if home and (Path(home) / "bin" / "java").exists() \
        else shutil.which("java")
    if not java:
        raise InputError("the Spark engine needs Java (17 or newer) and none was found: install "
                         "a JDK (e.g. apt-get install openjdk-17-jre-headless) or set JAVA_HOME, "
                         "or use data.engine = \"local\".")
    return java


def _pyspark():
    try:
        import pyspark  # noqa: F401
        from pyspark.sql import SparkSession, functions as F, types as T
    except ImportError:
        raise InputError("data.engine = \"spark\" needs pyspark: pip install 'cutscan[spark]', "
                         "or use data.engine = \"local\".") from None
    return SparkSession, F, T


def local_session(master: str = "local[2]"):
    """Start (or reuse) a local SparkSession — for the command line and tests only."""
    require_java()
    SparkSession, _, _ = _pyspark()
    return (SparkSession.builder.master(master).appName("cutscan")
            .config("spark.sql.shuffle.partitions", "2")
            .config("spark.ui.enabled", "false")
            .config("spark.ui.showConsoleProgress", "false")
            .config("spark.sql.execution.arrow.pyspark.enabled", "true").getOrCreate())


def _frame(table):
    """A Spark DataFrame from a Spark DataFrame or an opened file (needs an active session)."""
    if type(table).__module__.startswith("pyspark"):
        return table, "<Spark DataFrame>"
    SparkSession, _, _ = _pyspark()
    spark = SparkSession.getActiveSession()
    if spark is None:
        raise InputError(f"{table.name}: data.engine = \"spark\" needs an active SparkSession "
                         "(cutscan never starts a cluster from the library): create one, or run "
                         "the cutscan command, which starts a local one.")
    from ..io import _format_of
    fmt = _format_of(Path(table.name))
    if fmt == "parquet":
        return spark.read.parquet(table.name), table.name
    if fmt == "csv":
        return spark.read.csv(table.name, header=True, inferSchema=True), table.name
    raise InputError(f"{table.name}: the Spark engine reads Parquet and CSV; convert the file "
                     "or use data.engine = \"local\".")


def spark_keys(F, x, p: float, d: int):
    """:func:`scanner.engines.grid.keys` as a Spark column (same double operations)."""
    w = grid.width_of(p, d)

    def edge(k):
        return (k * F.lit(p)) / F.lit(10.0 ** d) if d > 0 else k * F.lit(p * 10.0 ** (-d))
    k = F.floor(x / F.lit(w)).cast("double")
    k = k - F.when(edge(k) > x, 1.0).otherwise(0.0)
    k = k + F.when(edge(k + 1.0) <= x, 1.0).otherwise(0.0)
    return k.cast("long")


def spark_split_keys(F, x, p: float, d: int, forced, name: str = ""):
    """Grid keys with the parts of bins split at forced edges: ``k + j/SUB`` (as the local engine)."""
    k = spark_keys(F, x, p, d)
    kk, v, rc = grid.inner(forced, p, d, name)
    key = k.cast("double")
    for b, e, r in zip(kk, v, rc):
        above = (x >= F.lit(float(e))) if r else (x > F.lit(float(e)))
        key = key + F.when((k == F.lit(int(b))) & above, 1.0 / grid.SUB).otherwise(0.0)
    return key


def _check(df, name, plan: BinPlan, T):
    kinds = dict(df.dtypes)
    for c in plan.needed:
        if c not in kinds:
            role = "running variable" if c in plan.running else "date" if c == plan.date else \
                "treatment" if c in plan.treatments else "tracked"
            raise ColumnNotFoundError(c, list(df.columns), name, role)
    for c in list(plan.running) + list(plan.columns):
        if kinds[c] in ("string", "binary") or kinds[c].startswith(("array", "map", "struct")):
            raise InputError(f"{name}: column '{c}' has Spark type {kinds[c]}; running variables "
                             "and tracked columns must be numeric — cast it first.")


def bin_spark(table, plan: BinPlan, progress=None) -> BinResult:
    """Bin a Spark DataFrame (or a file read through the active session)."""
    _, F, T = _pyspark()
    df, name = _frame(table)
    _check(df, name, plan, T)
    if plan.split_seed is not None:
        raise InputError("the half-sample split needs row positions, which a Spark DataFrame does "
                         "not have; run this scan with data.engine = \"local\".")

    def num(c):
        v = F.col(c).cast("double")
        return F.when(F.isnan(v) | (F.abs(v) == float("inf")), None).otherwise(v)
    sel = [num(c).alias(f"c{j}") for j, c in enumerate(plan.columns)]
    for i, r in enumerate(plan.running):
        sel.append(F.col(r).cast("double").alias(f"x{i}"))
    if plan.date and plan.date in plan.needed:
        d = F.col(plan.date)
        if dict(df.dtypes)[plan.date] == "string":
            d = F.to_date(d)
        sel.append(F.coalesce(F.year(d) * 4 + F.quarter(d) - 1, F.lit(-1)).cast("int").alias("period"))
    else:
        sel.append(F.lit(-1).alias("period"))
    sel.append(F.lit(-1).alias("half"))
    base = df.select(*sel).cache()     # read once; every aggregation below starts from here
    cols = [f"c{j}" for j in range(len(plan.columns))]
    # Accounting and treatment checks in one job.
    checks = [F.count(F.lit(1)).alias("rows")]
    for i, _ in enumerate(plan.running):
        x = F.col(f"x{i}")
        checks.append(F.sum(F.when(x.isNull() | F.isnan(x), 1).otherwise(0)).alias(f"miss{i}"))
        checks.append(F.sum(F.when(F.abs(x) == float("inf"), 1).otherwise(0)).alias(f"inf{i}"))
    for t in plan.treatments:
        c = F.col(f"c{plan.columns.index(t)}")
        checks.append(F.sum(F.when(c.isNotNull() & ~c.isin(0.0, 1.0), 1).otherwise(0)).alias(f"bad_{t}"))
    acct = base.agg(*checks).collect()[0].asDict()
    for t in plan.treatments:
        if acct[f"bad_{t}"]:
            seen = [r[0] for r in base.select(f"c{plan.columns.index(t)}").distinct().limit(8).collect()]
            raise InputError(f"{name}: treatment column '{t}' must be 0/1 (or true/false); values "
                             f"seen: {', '.join(f'{v:g}' for v in seen if v is not None)}. Recode it "
                             "to 0/1, or list it under covariates.")
    stats = {}
    try:
        for i, r in enumerate(plan.running):
            stats[r] = _bin_one(F, base, f"x{i}", r, cols, plan).validate()
            if progress:
                progress(0)
    finally:
        base.unpersist()
    missing = {r: int(acct[f"miss{i}"] or 0) for i, r in enumerate(plan.running)}
    nonfinite = {r: int(acct[f"inf{i}"] or 0) for i, r in enumerate(plan.running)}
    return BinResult(stats, int(acct["rows"]), missing, nonfinite)


def _row_aggs(F, x, cols, plan):
    """Sum aggregations of one row-level frame, named like BinnedStats fields."""
    out = [F.count(F.lit(1)).alias("n"), F.sum(x).alias("sx"), F.sum(x * x).alias("sxx")]
    for j, c in enumerate(cols):
        v = F.col(c)
        out += [F.count(v).alias(f"cnt_{j}"), F.sum(v).alias(f"s1_{j}"), F.sum(v * v).alias(f"s2_{j}")]
    for q, (a, b) in enumerate(plan.pairs):
        va, vb = F.col(cols[plan.columns.index(a)]), F.col(cols[plan.columns.index(b)])
        both = va.isNotNull() & vb.isNotNull()
        out += [F.count(F.when(both, 1)).alias(f"pn_{q}"),
                F.sum(F.when(both, va)).alias(f"pa_{q}"), F.sum(F.when(both, vb)).alias(f"pb_{q}"),
                F.sum(F.when(both, va * va)).alias(f"paa_{q}"),
                F.sum(F.when(both, vb * vb)).alias(f"pbb_{q}"), F.sum(va * vb).alias(f"pab_{q}")]
    return out


def _bin_one(F, base, xcol, running, cols, plan) -> BinnedStats:
    x = F.col(xcol)
    rows = base.where(x.isNotNull() & ~F.isnan(x) & (F.abs(x) != float("inf")))
    detail, p = plan.period_of(running), F.col("period")
    if detail != "quarter":        # the period detail this running variable keeps (BinPlan.periods)
        per = F.lit(-1) if detail == "none" else F.when(p >= 0, F.floor(p / 4) * 4).otherwise(-1)
        rows = rows.withColumn("period", per.cast("int"))
    acc = Accumulator(running, plan)
    if acc.state == "user":
        binned = rows.groupBy(spark_split_keys(F, x, *acc.grid, acc.forced, running).alias("key"),
                              "period", "half") \
            .agg(*_row_aggs(F, x, cols, plan))
        acc.stats = _collect(binned, acc.stats, plan)
        return acc.finish()
    exact = rows.groupBy(x.alias("key"), "period", "half").agg(*_row_aggs(F, x, cols, plan)).cache()
    try:
        distinct, big = exact.agg(F.countDistinct("key"), F.max(F.abs(F.col("key")))).collect()[0]
        if distinct <= plan.fine_keys:
            acc.stats = _collect(exact, acc.stats, plan)
            return acc.finish()
        # The settled power-of-ten level: one finer than the coarsest level that still has more
        # than fine_keys occupied bins (same rule the local engine reaches by coarsening).
        values = exact.select("key").distinct()
        e = grid.top_level(np.array([big]))
        while True:
            levels = list(range(e, e - 6, -1))
            occ = values.agg(*[F.countDistinct(spark_keys(F, F.col("key"), *grid.power_grid(lv)))
                               for lv in levels]).collect()[0]
            over = [lv for lv, o in zip(levels, occ) if o > plan.fine_keys]
            if over or e < -grid.MAX_DECIMALS:
                break
            e -= 6
        level = (over[0] if over else e) + 1
        sums = [c for c in exact.columns if c not in ("key", "period", "half")]
        fine = exact.groupBy(spark_split_keys(F, F.col("key"), *grid.power_grid(level),
                                              acc.forced, running).alias("key"),
                             "period", "half").agg(*[F.sum(c).alias(c) for c in sums])
        acc.state, acc.level, acc.grid = "fine", level, grid.power_grid(level)
        acc.stats = _collect(fine, BinnedStats.empty(running, plan.columns, plan.pairs, "width",
                                                     grid.width_of(*acc.grid), 0.0, acc.forced),
                             plan)
        return acc.finish()
    finally:
        exact.unpersist()


def _collect(binned, template: BinnedStats, plan: BinPlan) -> BinnedStats:
    """Bring the (small) per-bin frame to the driver as BinnedStats, bins sorted."""
    pdf = binned.toPandas()
    k, p = len(plan.columns), len(plan.pairs)

    def arr(name, dtype=float):
        return pdf[name].fillna(0).to_numpy(dtype=dtype)

    def mat(prefix, width, dtype=float):
        if width == 0:
            return np.zeros((len(pdf), 0), dtype)
        return np.column_stack([arr(f"{prefix}_{j}", dtype) for j in range(width)])
    from dataclasses import replace
    part = replace(template, key=arr("key"), period=arr("period", np.int32),
                   half=arr("half", np.int8), n=arr("n", np.int64), sx=arr("sx"), sxx=arr("sxx"),
                   cnt=mat("cnt", k, np.int64), s1=mat("s1", k), s2=mat("s2", k),
                   pn=mat("pn", p, np.int64), pa=mat("pa", p), pb=mat("pb", p),
                   paa=mat("paa", p), pbb=mat("pbb", p), pab=mat("pab", p))
    return template.merge(part)
