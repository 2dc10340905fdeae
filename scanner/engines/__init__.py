"""Binning engines: the only code that touches rows.

Each engine turns a table into one :class:`~scanner.bins.BinnedStats` per running variable.
``bin_table`` dispatches on the engine name; optional engines import their libraries only
inside their own branch, so a pandas scan never imports pyspark.
"""
from __future__ import annotations

from .plan import BinPlan, BinResult


def bin_table(table, plan: BinPlan, engine: str = "local", progress=None) -> BinResult:
    """Run the one pass over ``table`` with the chosen engine."""
    if engine == "local":
        from .local import bin_local
        from .resources import reading_pool
        with reading_pool():
            return bin_local(table, plan, progress=progress)
    if engine == "spark":
        from .spark import bin_spark  # imported only here: pyspark is optional
        return bin_spark(table, plan, progress=progress)
    from ..errors import InputError
    raise InputError(f"data.engine = '{engine}' is not an engine; use 'local' or 'spark'.")


__all__ = ["BinPlan", "BinResult", "bin_table"]
