"""OMOP CDM v5.4 tables as a long-format registry (DuckDB): finding and registering the tables.

``data.omop`` names a folder holding the standard's tables as ``<table>.parquet`` or
``<table>.csv`` files (or a folder per table), or a DuckDB database file holding them.  Table
and column names are the standard's (OHDSI, CDM v5.4).
"""
from __future__ import annotations

from pathlib import Path

from ..errors import InputError
from .sql import OMOP_TABLES, omop_view_sql

OPTIONAL = ("procedure_occurrence", "concept_ancestor")


def _find(folder: Path, table: str):
    for cand in (folder / f"{table}.parquet", folder / f"{table}.csv", folder / table):
        if cand.exists():
            return cand
    return None


def omop_relations(con, where: Path) -> dict:
    """Relation expressions for each OMOP table present (required ones must be)."""
    from .duck import _relation
    rels = {}
    if where.is_file() and where.suffix.lower() in (".duckdb", ".db"):
        con.execute(f"ATTACH '{str(where).replace(chr(39), chr(39) * 2)}' AS cdm (READ_ONLY)")
        have = {r[0] for r in con.execute(
            "SELECT table_name FROM information_schema.tables WHERE table_catalog = 'cdm'").fetchall()}
        rels = {t: f"cdm.{t}" for t in OMOP_TABLES + OPTIONAL if t in have}
    elif where.is_dir():
        for t in OMOP_TABLES + OPTIONAL:
            p = _find(where, t)
            if p is not None:
                rels[t] = _relation(p, f"OMOP table {t}")
    else:
        raise InputError(f"{where}: data.omop must be a folder of OMOP CDM tables (Parquet or CSV) "
                         "or a DuckDB database file holding them.")
    missing = [t for t in OMOP_TABLES if t not in rels and t != "procedure_occurrence"]
    if missing:
        raise InputError(f"{where}: OMOP table(s) {', '.join(missing)} not found; cutscan needs "
                         f"{', '.join(t for t in OMOP_TABLES if t != 'procedure_occurrence')} "
                         "(as <table>.parquet or <table>.csv).")
    return rels


def register_omop(con, lay, where: Path) -> None:
    """Create the views ``meas``, ``ev``, ``obs`` and the uptake code map from OMOP tables."""
    for name, sel in omop_view_sql(lay, "duckdb", omop_relations(con, where)).items():
        con.execute(f"CREATE VIEW {name} AS {sel}")
