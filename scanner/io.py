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
                      text_to_numbers, to_timestamps)

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
    """Open a file path, a folder of Parquet files, a pandas DataFrame, a pyarrow Table or Dataset.

    ``text_columns`` are read as text from CSV files (see :func:`_csv_format`).
    """
    if isinstance(source, pa.Table):
        return _from_arrow(source, name or "<pyarrow Table>")
    if isinstance(source, pa.RecordBatch):
        return _from_arrow(pa.Table.from_batches([source]), name or "<pyarrow RecordBatch>")
    if isinstance(source, ds.Dataset):
        return _from_dataset(source, name or "<pyarrow Dataset>")
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
                if fmt == "parquet":
                    yield from _parquet_batches(dataset, cols, rows)
                    return
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


def _parquet_batches(dataset, cols, rows):
    """Parquet files one by one, row group by row group: the dataset scanner decodes ahead of a
    slow consumer (about 500 MB held for a 10M-row folder), a file reader only what is asked
    for.  A file whose column types differ from the folder's is read through the dataset, which
    converts them, so every batch has the same types either way."""
    import pyarrow.parquet as pq
    schemas = {f: pq.read_schema(f).remove_metadata() for f in dataset.files}
    # One type per column over every file (int16 in one file and double in another read as
    # double), not the first file's, which would truncate 0.5 to an integer.
    want = None
    for f, s in schemas.items():
        s = pa.schema([s.field(c) for c in cols if c in s.names])
        try:
            want = s if want is None else pa.unify_schemas([want, s], promote_options="permissive")
        except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            differ = [c for c in s.names if c in want.names and s.field(c).type != want.field(c).type]
            differ = differ or list(s.names)     # not a plain type difference: name them all
            raise InputError(
                f"{f}: column(s) {', '.join(differ)} have a different type here "
                f"({', '.join(f'{c} {s.field(c).type}' for c in differ)}) than in the files "
                f"before it ({', '.join(f'{c} {want.field(c).type}' for c in differ if c in want.names)}; "
                f"{_arrow_reason(exc)}). Store each column with one type in every file (numbers as "
                "float64).") from None
    want = want if want is not None else dataset.schema
    for f in dataset.files:
        have = schemas[f]
        if all(c in have.names and have.field(c).type == want.field(c).type for c in cols):
            yield from pq.ParquetFile(f).iter_batches(batch_size=rows, columns=cols)
            continue
        try:
            yield from ds.dataset(f, format="parquet", schema=want).to_batches(
                columns=cols, batch_size=rows)
        except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError) as exc:
            differ = [c for c in cols if c in have.names and c in want.names
                      and have.field(c).type != want.field(c).type]
            raise InputError(
                f"{f}: column(s) {', '.join(differ) or ', '.join(cols)} have a different type here "
                f"({', '.join(f'{c} {have.field(c).type}' for c in differ)}) than in the other "
                f"files of the folder and cannot be converted ({_arrow_reason(exc)}). Store each "
                "column with one type in every file (numbers as float64).") from None


def _is_pandas(obj) -> bool:
    return type(obj).__module__.startswith("pandas") and hasattr(obj, "columns")


def _from_arrow(table: pa.Table, name: str) -> Table:
    def batches(cols, rows):
        yield from table.select(cols).to_batches(max_chunksize=rows)
    return Table(name, list(table.column_names), batches, table.num_rows)


def _from_dataset(dataset, name: str) -> Table:
    def batches(cols, rows):
        yield from dataset.to_batches(columns=cols, batch_size=rows)
    return Table(name, list(dataset.schema.names), batches)


def _from_pandas(df, name: str) -> Table:
    """A pandas DataFrame of any dtypes: NumPy, nullable (Int64, boolean, Float64), categorical,
    pyarrow-backed (including text columns whose Arrow data are chunked) and object columns."""
    names = [str(c) for c in df.columns]
    dup = sorted({c for c in names if names.count(c) > 1})
    if dup:
        raise InputError(f"{name}: column name {dup[0]!r} appears more than once; rename the "
                         "columns so that each name is unique.")
    by_name = dict(zip(names, range(len(names))))

    def batches(cols, rows):
        idx = [by_name[c] for c in cols]
        for start in range(0, max(len(df), 1), rows):
            part = df.iloc[start:start + rows, idx]
            part.columns = cols
            yield _batch_from_pandas(part, name)
    return Table(name, names, batches, len(df))


def _batch_from_pandas(df, name: str) -> pa.RecordBatch:
    """One RecordBatch from a DataFrame, column by column (one array each, never chunked)."""
    cols = [str(c) for c in df.columns]
    arrays = [_arrow_column(df.iloc[:, i], c, name) for i, c in enumerate(cols)]
    return pa.RecordBatch.from_arrays(arrays, names=cols)


def _arrow_column(series, column: str, name: str) -> pa.Array:
    """A pandas Series as one Arrow array; object columns of mixed types are read as text."""
    try:
        arr = pa.array(series, from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError, TypeError, ValueError):
        try:
            text = [None if v is None or (isinstance(v, float) and v != v) else str(v)
                    for v in series.tolist()]
            arr = pa.array(text, type=pa.string())
        except Exception as exc:
            raise InputError(f"{name}: column '{column}' (dtype {series.dtype}) cannot be read: "
                             f"{exc}; convert it to numbers or text first.") from None
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks() if arr.num_chunks != 1 else arr.chunk(0)
    if pa.types.is_string_view(arr.type):
        arr = arr.cast(pa.large_string())
    if pa.types.is_dictionary(arr.type) and pa.types.is_string_view(arr.type.value_type):
        arr = arr.dictionary_decode().cast(pa.large_string())
    return arr


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
                yield _batch_from_pandas(chunk[cols], str(path))
    table = Table(str(path), columns, batches)
    table.value_labels = _stata_labels(path) if fmt == "stata" else {}
    return table


def _stata_labels(path: Path) -> dict:
    """Value labels of a Stata file per column: {column: {code: label}} (empty when none)."""
    import pandas as pd
    try:
        with pd.read_stata(path, iterator=True) as r:
            labels = r.value_labels()
            names = getattr(r, "_lbllist", None) or []
            columns = getattr(r, "_varlist", None) or []
    except Exception:       # labels are a convenience: a file pandas reads without them still scans
        return {}
    return {str(c): {float(k): str(v) for k, v in labels[n].items()}
            for c, n in zip(columns, names) if n and n in labels}


# ---------------------------------------------------------------------- conversion
def numeric(batch: pa.RecordBatch, column: str, source: str, role: str, codes=(),
            reader=None) -> np.ndarray:
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
    elif pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t):
        return text_to_numbers(arr, column, source, role, codes, reader)
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


def prefetched(batches):
    """The batches of an iterator, the next one read in a background thread meanwhile.

    Reading and decoding a Parquet or CSV batch releases the GIL, so it overlaps with folding
    the previous batch; one batch is held ahead (memory: one batch more).  Batches come in the
    same order, and an error raised while reading is raised here, at the batch it belongs to.
    """
    from concurrent.futures import ThreadPoolExecutor
    it = iter(batches)
    end = object()
    with ThreadPoolExecutor(1) as ex:
        ahead = ex.submit(next, it, end)
        while True:
            batch = ahead.result()
            if batch is end:
                return
            ahead = ex.submit(next, it, end)
            yield batch
