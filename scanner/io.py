"""Reading tables: file formats, column checks and conversion of batches to numpy arrays.

The readers stream record batches where the format allows it (CSV, Parquet file or folder,
Feather/Arrow IPC through ``pyarrow.dataset``; Stata and SAS through pandas' chunked readers),
and only the columns a scan needs are read.  In-memory pandas DataFrames and pyarrow Tables are
accepted through the Python API.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

from .errors import ColumnNotFoundError, InputError

BATCH_ROWS = 1_000_000

_FORMATS = {
    ".csv": "csv", ".tsv": "csv", ".txt": "csv", ".gz": "csv",
    ".parquet": "parquet", ".pq": "parquet",
    ".feather": "ipc", ".arrow": "ipc", ".ipc": "ipc",
    ".dta": "stata", ".sas7bdat": "sas",
}


@dataclass
class Table:
    """A table to scan: its name (for messages), its columns and a way to stream batches."""

    name: str
    columns: list[str]
    _batches: object          # callable(columns, batch_rows) -> iterator of pa.RecordBatch
    num_rows: int | None = None

    def batches(self, columns: list[str], batch_rows: int = BATCH_ROWS) -> Iterator[pa.RecordBatch]:
        return self._batches(columns, batch_rows)

    def require(self, column: str, role: str) -> None:
        if column not in self.columns:
            raise ColumnNotFoundError(column, self.columns, self.name, role)


def _format_of(path: Path) -> str:
    if path.is_dir():
        exts = {p.suffix.lower() for p in path.rglob("*") if p.is_file() and not p.name.startswith(("_", "."))}
        for ext in (".parquet", ".pq", ".csv", ".feather", ".arrow"):
            if ext in exts:
                return _FORMATS[ext]
        raise InputError(f"{path}: folder holds no .parquet, .csv or .feather files; "
                         "point data.source at a file or a folder of Parquet files.")
    suffixes = [s.lower() for s in path.suffixes]
    for s in reversed(suffixes):
        if s in _FORMATS and s != ".gz":
            return _FORMATS[s]
    if suffixes and suffixes[-1] == ".gz":
        return "csv"
    raise InputError(f"{path}: unknown file type '{path.suffix}'. cutscan reads .csv, .parquet "
                     "(file or folder), .feather/.arrow, .dta and .sas7bdat.")


def open_table(source, name: str | None = None) -> Table:
    """Open a file path, a folder of Parquet files, a pandas DataFrame or a pyarrow Table."""
    if isinstance(source, pa.Table):
        return _from_arrow(source, name or "<pyarrow Table>")
    if _is_pandas(source):
        return _from_pandas(source, name or "<pandas DataFrame>")
    path = Path(source)
    if not path.exists():
        raise InputError(f"{path}: file not found. Check data.source in the spec "
                         "(paths are relative to the spec file).")
    fmt = _format_of(path)
    if fmt in ("csv", "parquet", "ipc"):
        try:
            dataset = ds.dataset(str(path), format=fmt)
            columns = list(dataset.schema.names)
        except (pa.ArrowInvalid, pa.ArrowTypeError, OSError) as exc:
            raise InputError(f"{path}: cannot be read as {fmt}: {exc}") from None

        def batches(cols, rows, dataset=dataset):
            try:
                # Bounded read-ahead keeps peak memory at a few batches, whatever the file size.
                for b in dataset.to_batches(columns=cols, batch_size=rows, batch_readahead=2,
                                            fragment_readahead=1):
                    yield b
            except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
                raise InputError(f"{path}: cannot be read: {exc}. Check the file's format "
                                 "and that the columns hold one type each.") from None
        return Table(str(path), columns, batches)
    return _from_pandas_reader(path, fmt)


def _is_pandas(obj) -> bool:
    return type(obj).__module__.startswith("pandas") and hasattr(obj, "columns")


def _from_arrow(table: pa.Table, name: str) -> Table:
    def batches(cols, rows):
        yield from table.select(cols).to_batches(max_chunksize=rows)
    return Table(name, list(table.column_names), batches, table.num_rows)


def _from_pandas(df, name: str) -> Table:
    def batches(cols, rows):
        for start in range(0, max(len(df), 1), rows):
            part = df.iloc[start:start + rows][cols]
            yield pa.RecordBatch.from_pandas(part, preserve_index=False)
    return Table(name, [str(c) for c in df.columns], batches, len(df))


def _from_pandas_reader(path: Path, fmt: str) -> Table:
    import pandas as pd

    def reader(rows):
        if fmt == "stata":
            return pd.read_stata(path, chunksize=rows, convert_categoricals=False)
        return pd.read_sas(path, chunksize=rows)
    try:
        with reader(1) as r:
            first = next(iter(r))
        columns = [str(c) for c in first.columns]
    except Exception as exc:  # pandas raises many types for corrupt files
        raise InputError(f"{path}: cannot be read as {fmt}: {exc}") from None

    def batches(cols, rows):
        with reader(rows) as r:
            for chunk in r:
                chunk.columns = [str(c) for c in chunk.columns]
                yield pa.RecordBatch.from_pandas(chunk[cols], preserve_index=False)
    return Table(str(path), columns, batches)


# ---------------------------------------------------------------------- conversion
def numeric(batch: pa.RecordBatch, column: str, source: str, role: str) -> np.ndarray:
    """A batch column as float64 (missing → NaN); booleans become 0/1; text is refused."""
    arr = batch.column(batch.schema.get_field_index(column))
    t = arr.type
    if pa.types.is_dictionary(t):
        arr = arr.dictionary_decode()
        t = arr.type
    if pa.types.is_boolean(t):
        arr = pc.cast(arr, pa.float64())
    elif pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
        arr = pc.cast(arr, pa.float64())
    elif pa.types.is_null(t):
        return np.full(len(arr), np.nan)
    elif pa.types.is_string(t) or pa.types.is_large_string(t):
        sample = [v for v in pc.unique(arr.drop_null()).to_pylist()[:4]]
        raise InputError(
            f"{source}: {role} column '{column}' holds text "
            f"({', '.join(repr(s) for s in sample)}{', ...' if sample else ''}); {role} columns "
            "must be numeric — cast it, or declare non-numeric codes as missing.")
    else:
        raise InputError(f"{source}: {role} column '{column}' has type {t}; it must be numeric "
                         "(integer, float, decimal or boolean).")
    return arr.to_numpy(zero_copy_only=False).astype(np.float64, copy=False)


def check_binary(values: np.ndarray, column: str, source: str) -> None:
    """Treatments must be 0/1 (or boolean); show the values seen otherwise."""
    ok = np.isnan(values) | (values == 0) | (values == 1)
    if not ok.all():
        seen = np.unique(values[~np.isnan(values)])
        shown = ", ".join(f"{v:g}" for v in seen[:8]) + (", ..." if seen.size > 8 else "")
        raise InputError(f"{source}: treatment column '{column}' must be 0/1 (or true/false); "
                         f"values seen: {shown}. Recode it to 0/1, or list it under covariates.")


def period_codes(batch: pa.RecordBatch, column: str, source: str) -> np.ndarray:
    """Calendar quarter codes (year*4 + quarter-1) for a date column; -1 where missing."""
    arr = batch.column(batch.schema.get_field_index(column))
    t = arr.type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        import pandas as pd
        vals = pd.to_datetime(pd.Series(arr.to_pylist()), errors="coerce", format="mixed")
        bad = vals.isna() & pd.Series(arr.is_valid().to_pylist())
        if bad.any():
            example = arr.to_pylist()[int(np.flatnonzero(bad.to_numpy())[0])]
            raise InputError(f"{source}: date column '{column}' holds '{example}', which is not "
                             "a date; use ISO dates (2021-03-31) or leave the cell empty.")
        years = vals.dt.year.to_numpy(dtype=float, na_value=np.nan)
        quarters = vals.dt.quarter.to_numpy(dtype=float, na_value=np.nan)
    elif pa.types.is_timestamp(t) or pa.types.is_date(t):
        years = pc.year(arr).to_numpy(zero_copy_only=False).astype(float)
        quarters = pc.quarter(arr).to_numpy(zero_copy_only=False).astype(float)
    else:
        raise InputError(f"{source}: date column '{column}' has type {t}; it must hold dates.")
    code = years * 4 + quarters - 1
    return np.where(np.isnan(code), -1, code).astype(np.int32)
