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
from .parsing import (DateParser, check_not_temporal, csv_conversion_message, drop_codes,
                      split_codes, text_to_numbers, to_timestamps)

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


def _csv_format(path: Path, text_columns=()):
    """CSV read options: quoted newlines allowed; integer-looking columns read as float64
    (so a later '1.5' is not an error); ``text_columns`` (identifiers, columns with text
    missing codes) read as text, so '007' keeps its zeros and codes reach the parser."""
    import pyarrow.csv as pcsv
    parse = pcsv.ParseOptions(delimiter=sniff_delimiter(path), newlines_in_values=True)
    first = ds.dataset(str(path), format=ds.CsvFileFormat(parse_options=parse))
    types = {f.name: pa.float64() for f in first.schema if pa.types.is_integer(f.type)}
    types.update({c: pa.string() for c in text_columns if c in first.schema.names})
    return ds.CsvFileFormat(parse_options=parse,
                            convert_options=pcsv.ConvertOptions(column_types=types))


def sniff_delimiter(path: Path) -> str:
    """',' unless the file is .tsv or its header line has no comma but exactly one of ; tab |."""
    if path.is_dir() or ".tsv" in [s.lower() for s in path.suffixes]:
        return "\t" if not path.is_dir() else ","
    try:
        import gzip
        opener = gzip.open if path.suffix.lower() == ".gz" else open
        with opener(path, "rb") as fh:
            head = fh.readline(65536).decode("utf-8", "replace")
    except OSError:
        return ","
    if "," in head:
        return ","
    found = [d for d in (";", "\t", "|") if d in head]
    return found[0] if len(found) == 1 else ","


def _arrow_reason(exc: Exception) -> str:
    """pyarrow's message without its wrapper text ('Error creating dataset ... Invalid: ')."""
    text = str(exc)
    for marker in ("Invalid: ", "CSV parse error: "):
        if marker in text:
            text = text.rsplit(marker, 1)[-1]
    return text.strip().rstrip(".")


def open_table(source, name: str | None = None, text_columns=()) -> Table:
    """Open a file path, a folder of Parquet files, a pandas DataFrame or a pyarrow Table.

    ``text_columns`` are read as text from CSV files (see :func:`_csv_format`).
    """
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
            dataset = ds.dataset(str(path), format=_csv_format(path, text_columns)
                                 if fmt == "csv" else fmt)
            columns = list(dataset.schema.names)
        except (pa.ArrowInvalid, pa.ArrowTypeError, OSError, UnicodeDecodeError) as exc:
            fix = ("check that it is UTF-8 text with one header row of unique names, the same "
                   "number of cells in every row, and quotes closed" if fmt == "csv" else
                   f"check that it is a complete {fmt} file")
            raise InputError(f"{path}: cannot be read as {fmt}: {_arrow_reason(exc)}; {fix}.") from None

        def batches(cols, rows, dataset=dataset):
            try:
                # Bounded read-ahead keeps peak memory at a few batches, whatever the file size.
                for b in dataset.to_batches(columns=cols, batch_size=rows, batch_readahead=2,
                                            fragment_readahead=1):
                    yield b
            except (pa.ArrowInvalid, pa.ArrowTypeError, UnicodeDecodeError) as exc:
                clear = csv_conversion_message(exc, path, columns)
                raise InputError(clear or f"{path}: cannot be read: {_arrow_reason(exc)}; check the "
                                 "file's format, that every row has as many cells as the header, "
                                 "and that each column holds one type.") from None
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
def numeric(batch: pa.RecordBatch, column: str, source: str, role: str, codes=()) -> np.ndarray:
    """A batch column as float64 (missing → NaN); booleans become 0/1.

    Text is parsed by :func:`scanner.parsing.text_to_numbers` (numbers, thousands separators,
    yes/no) or refused; ``codes`` are declared missing codes.
    """
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
        return text_to_numbers(arr, column, source, role, codes)
    else:
        check_not_temporal(t, column, source, role)
        raise InputError(f"{source}: {role} column '{column}' has type {t}; it must be numeric "
                         "(integer, float, decimal or boolean).")
    return drop_codes(arr.to_numpy(zero_copy_only=False).astype(np.float64, copy=False), codes)


def check_binary(values: np.ndarray, column: str, source: str) -> None:
    """Treatments must be 0/1 (or boolean); show the values seen otherwise."""
    ok = np.isnan(values) | (values == 0) | (values == 1)
    if not ok.all():
        seen = np.unique(values[~np.isnan(values)])
        shown = ", ".join(f"{v:g}" for v in seen[:8]) + (", ..." if seen.size > 8 else "")
        raise InputError(f"{source}: treatment column '{column}' must be 0/1 (or true/false); "
                         f"values seen: {shown}. Recode it to 0/1, or list it under covariates.")


def period_codes(batch: pa.RecordBatch, column: str, source: str,
                 parser: DateParser | None = None) -> np.ndarray:
    """Calendar quarter codes (year*4 + quarter-1) for a date column; -1 where missing."""
    arr = batch.column(batch.schema.get_field_index(column))
    t = arr.type
    if not (pa.types.is_timestamp(t) or pa.types.is_date(t) or pa.types.is_null(t)):
        arr = to_timestamps(arr, column, source, parser)
    if pa.types.is_null(arr.type):
        return np.full(len(arr), -1, np.int32)
    years = pc.year(arr).to_numpy(zero_copy_only=False).astype(float)
    quarters = pc.quarter(arr).to_numpy(zero_copy_only=False).astype(float)
    code = years * 4 + quarters - 1
    return np.where(np.isnan(code), -1, code).astype(np.int32)


# ---------------------------------------------------------------------- spec-driven cleaning
def cleaned(table: Table, codes: dict, roles: dict, date: str | None = None,
            date_format: str | None = None) -> Table:
    """``table`` with declared missing codes applied and the date column parsed, batch by batch.

    ``codes`` maps a column to its missing codes; ``roles`` maps it to its role (for messages).
    Coded columns leave as float64, the date column as timestamps; one :class:`DateParser` serves
    every batch, so the day/month order cannot change part-way through a file.  The number of
    values set missing by a code is counted per column in the returned table's ``coded``.
    """
    if not codes and not date:
        return table
    parser = DateParser(date, table.name, date_format) if date else None
    counts = dict.fromkeys(codes, 0)

    def batches(cols, rows):
        for b in table.batches(cols, rows):
            names = b.schema.names
            arrays = list(b.columns)
            for c, cc in codes.items():
                if c in names:
                    i = names.index(c)
                    with_codes = numeric(b, c, table.name, roles.get(c, "scanned"), cc)
                    counts[c] += _code_hits(b.column(i), with_codes, cc, c, table.name, roles)
                    arrays[i] = pa.array(with_codes, from_pandas=True)
            if parser and date in names:
                i = names.index(date)
                arrays[i] = to_timestamps(arrays[i], date, table.name, parser)
            yield pa.RecordBatch.from_arrays(arrays, names=names)
    out = Table(table.name, table.columns, batches, table.num_rows)
    out.coded = counts
    return out


def _code_hits(arr, with_codes, codes, column, source, roles) -> int:
    """How many cells of one batch column a declared code turned into missing."""
    text, _ = split_codes(codes)
    t = arr.type.value_type if pa.types.is_dictionary(arr.type) else arr.type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        s = pc.utf8_trim_whitespace(arr.cast(pa.string()))
        hits = int(pc.sum(pc.is_in(s, value_set=pa.array(sorted(text)))).as_py() or 0) if text else 0
        base = text_to_numbers(arr, column, source, roles.get(column, "scanned"), sorted(text))
        return hits + int(np.isnan(with_codes).sum() - np.isnan(base).sum())
    return int(np.isnan(with_codes).sum() - np.isnan(numeric_plain(arr)).sum())


def numeric_plain(arr) -> np.ndarray:
    """A numeric or boolean array as float64 without any codes."""
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    return pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False).astype(np.float64, copy=False)
