"""Long-format registries (measurements and treatment events, or OMOP CDM tables) → analysis
rows, built by a database engine (DuckDB by default), then scanned as usual."""
from .layout import Layout, Score, Uptake, parse_layout

__all__ = ["Layout", "Score", "Uptake", "parse_layout"]


def open_registry(spec, data=None):
    """Build the analysis rows of a long-format spec in DuckDB; return a scan Table over them.

    The returned table carries ``registry`` (for drop counts) and is read in a fixed row order.
    ``data`` may map ``"meas"``, ``"events"`` and ``"periods"`` to pandas DataFrames or pyarrow
    Tables in place of the spec's files.
    """
    from pathlib import Path
    from ..io import Table
    from .duck import Registry
    base = Path(spec.path).parent if spec.path else Path.cwd()
    reg = Registry(spec.layout, base, data)
    table = Table(reg.name, reg.columns, reg.batches, reg.num_rows)
    table.registry = reg
    return table


def open_spark_registry(spec, data=None):
    """The analysis rows as a Spark DataFrame (Spark SQL in the active session), carrying
    ``registry`` for the drop counts."""
    from pathlib import Path
    from ..engines.spark import _pyspark
    from ..errors import InputError
    from .spark_sql import SparkRegistry
    spark = _pyspark()[0].getActiveSession()
    if spark is None:
        raise InputError(f"{spec.path or '<spec>'}: data.engine = \"spark\" needs an active "
                         "SparkSession (cutscan never starts a cluster from the library): create "
                         "one, or run the cutscan command, which starts a local one.")
    base = Path(spec.path).parent if spec.path else Path.cwd()
    reg = SparkRegistry(spark, spec.layout, base, data)
    frame = reg.frame
    frame.registry = reg
    return frame


def layout_dropped(dropped: list, spec, registry) -> list:
    """``data.dropped`` of a long-format scan: the layout's own drops replace the generic ones.

    In the stacked analysis table a row of one running variable is "missing" for every other,
    and an uptake is missing exactly when the look-back found earlier use or the window was not
    observed; both are counted by the registry with their real reasons instead.
    """
    uptakes = set(spec.layout.treatments)
    keep = [d for d in dropped if d["reason"] != "running variable missing"
            and not (d["reason"] == "treatment missing" and d["treatment"] in uptakes)]
    return keep + registry.dropped()
