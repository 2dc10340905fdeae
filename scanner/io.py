"""Reading tables: file formats, column checks and conversion of batches to numpy arrays.

The readers stream record batches where the format allows it (CSV, Parquet file or folder,
Feather/Arrow IPC through ``pyarrow.dataset``; Stata and SAS through pandas' chunked readers),
and only the columns a scan needs are read.  In-memory pandas DataFrames and pyarrow Tables are
accepted through the Python API.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

from .errors import ColumnNotFoundError, InputError
from .parsing import (NULL_TOKENS, DateParser, NumberReader, apply_value_map, check_not_temporal,
                      csv_conversion_message, drop_codes, split_codes, text_to_numbers,
                      to_timestamps)
from .units import convert_array, same_unit

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


# ---------------------------------------------------------------------- spec-driven cleaning
@dataclass
class UnitColumn:
    """Row-by-row units of one running variable: ``column`` holds each row's unit spelling,
    ``spellings`` maps a spelling (lower case, trimmed) to a known unit, ``target`` is the
    running variable's unit and ``quantity`` its quantity (for the conversion factors)."""

    column: str
    spellings: dict
    target: str
    quantity: str | None


@dataclass
class Cleaning:
    """What :func:`cleaned` does to each batch, and what it counted.

    Parsing (always): declared missing codes, decimal commas, value maps and dates; every scanned
    column leaves as float64.  Then, per running variable, after the data-quality profile has
    been read (``scanner.quality``): ``sentinels`` (values set missing), ``units`` (row-by-row
    conversion from a unit column) and ``keep_range`` (values outside it fit only another unit of
    the quantity and are set missing).  Counts are exact: they are taken in the pass itself.
    """

    codes: dict
    roles: dict
    date: str | None = None
    date_format: str | None = None
    decimal: str | None = None
    value_maps: dict = field(default_factory=dict)
    sentinels: dict = field(default_factory=dict)          # column -> set of values
    units: dict = field(default_factory=dict)              # column -> UnitColumn
    keep_range: dict = field(default_factory=dict)         # column -> (low, high)
    watch: dict = field(default_factory=dict)              # column -> codes counted, kept
    # counters
    coded: dict = field(default_factory=dict)
    mapped: dict = field(default_factory=dict)
    sentinel_hits: dict = field(default_factory=dict)      # column -> {value: rows}
    converted: dict = field(default_factory=dict)          # column -> {unit: rows}
    unit_missing: dict = field(default_factory=dict)       # column -> rows with an empty unit
    out_of_range: dict = field(default_factory=dict)       # column -> rows set missing
    watched: dict = field(default_factory=dict)            # column -> {value: rows}
    # the profile: the first ``profile_rows`` rows of the pass, handed to ``planner``
    planner: object = None
    profile_columns: tuple = ()
    profile_rows: int = 500_000
    planned: bool = False
    reader: NumberReader | None = None

    def scanned(self) -> list[str]:
        return list(self.roles)


def cleaned(table: Table, codes: dict, roles: dict, date: str | None = None,
            date_format: str | None = None, cleaning: Cleaning | None = None) -> Table:
    """``table`` with every scanned column parsed to float64 and cleaned, batch by batch.

    ``codes`` maps a column to its declared missing codes; ``roles`` maps each scanned column to
    its role (for messages).  The date column leaves as timestamps; one :class:`DateParser` and
    one :class:`NumberReader` serve every batch, so the day/month order and a column's decimal
    mark cannot change part-way through a file.  The returned table's ``cleaning`` holds the
    counts (values set missing by a code in ``coded``, cells mapped, units converted, ...).
    """
    cl = cleaning or Cleaning(codes, roles, date, date_format)
    cl.reader = cl.reader or NumberReader(cl.decimal, table.name)
    parser = DateParser(date, table.name, date_format) if date else None
    for c in codes:
        cl.coded.setdefault(c, 0)

    scanned = set(roles) | set(codes) | set(cl.value_maps)

    def parse(b):
        values = {}
        for i, c in enumerate(b.schema.names):
            if c in scanned and _needs_work(b.column(i), c, cl):
                values[c] = _parse(b, i, c, cl, table.name)
        return b, values

    def finish(b, values, cols, extra):
        names = b.schema.names
        arrays = list(b.columns)
        for i, c in enumerate(names):
            if c in scanned and c not in values and _needs_work(b.column(i), c, cl):
                values[c] = _parse(b, i, c, cl, table.name)     # needs work since the profile
        for c, x in values.items():
            if _changes(c, cl) or cl.watch.get(c):
                if not x.flags.writeable:
                    x = values[c] = x.copy()
                _after_profile(b, c, x, cl, table.name)
            arrays[names.index(c)] = pa.array(x, type=pa.float64(), from_pandas=True)
        if parser and date in names:
            i = names.index(date)
            arrays[i] = to_timestamps(arrays[i], date, table.name, parser)
        out = pa.RecordBatch.from_arrays(arrays, names=names)
        return out.select(list(cols)) if extra else out

    def plan(pending):
        """Hand the first rows' parsed values to the profile's planner (scanner.quality)."""
        profile = {}
        for c in cl.profile_columns:
            parts, left = [], cl.profile_rows
            for b, values in pending:
                if left <= 0:
                    break
                if c in values:
                    parts.append(values[c][:left])
                elif c in b.schema.names:
                    parts.append(numeric(b.slice(0, left), c, table.name, roles.get(c, "scanned")))
                left -= b.num_rows
            profile[c] = np.concatenate(parts) if parts else np.array([])
        cl.planned = True
        cl.planner(profile)

    def batches(cols, rows):
        extra = [u.column for c, u in cl.units.items() if c in cols and u.column not in cols]
        pending, seen = [], 0
        for b in table.batches(list(cols) + list(dict.fromkeys(extra)), rows):
            item = parse(b)
            if cl.planner is not None and not cl.planned:
                # The data-quality profile is the first rows of this very pass (no extra read):
                # they are held until enough rows are in, planned on, then cleaned and passed on.
                pending.append(item)
                seen += b.num_rows
                if seen < cl.profile_rows:
                    continue
                plan(pending)
                for p in pending:
                    yield finish(*p, cols, extra)
                pending = []
                continue
            yield finish(*item, cols, extra)
        if pending:
            plan(pending)
            for p in pending:
                yield finish(*p, cols, extra)
    out = Table(table.name, table.columns, batches, table.num_rows)
    out.cleaning = cl
    out.coded = cl.coded
    out.raw = table
    return out


def _changes(c: str, cl: Cleaning) -> bool:
    """True when the steps after the profile may change column ``c`` in place."""
    return bool(cl.sentinels.get(c) or c in cl.units or c in cl.keep_range)


def _needs_work(arr, c: str, cl: Cleaning) -> bool:
    """False for a numeric or boolean column nothing will change: the engine reads it as it is
    (parsing it here would only copy it)."""
    t = arr.type.value_type if pa.types.is_dictionary(arr.type) else arr.type
    plain = (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)
             or pa.types.is_decimal(t))
    return not plain or bool(cl.codes.get(c)) or c in cl.value_maps or _changes(c, cl) \
        or bool(cl.watch.get(c))


def _parse(b: pa.RecordBatch, i: int, c: str, cl: Cleaning, source: str) -> np.ndarray:
    """One column of a batch as float64: value map, or numbers/text with missing codes."""
    role = cl.roles.get(c, "scanned")
    cc = cl.codes.get(c, ())
    if c in cl.value_maps:
        arr = b.column(i)
        if cc:                                  # codes first: a code never needs a map entry
            text, nums = split_codes(cc)
            keep = _not_coded(arr, text, nums)
            hits = int(len(arr) - pc.sum(keep).as_py())
            cl.coded[c] = cl.coded.get(c, 0) + hits
            arr = pc.if_else(keep, arr, pa.nulls(len(arr), arr.type))
        x, hits = apply_value_map(arr, cl.value_maps[c], c, source)
        cl.mapped[c] = cl.mapped.get(c, 0) + hits
        return x
    x = numeric(b, c, source, role, cc, cl.reader)
    if cc:
        cl.coded[c] = cl.coded.get(c, 0) + _code_hits(b.column(i), x, cc, c, source, cl.roles,
                                                      cl.reader)
    return x


def _unit_name(spelling: str, quantity: str | None) -> str | None:
    from .units import lookup
    u = lookup(spelling, quantity)
    return u.name if u else None


def _not_coded(arr, text, nums):
    t = arr.type.value_type if pa.types.is_dictionary(arr.type) else arr.type
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        s = pc.utf8_trim_whitespace(arr.cast(pa.string()))
        hit = pc.is_in(s, value_set=pa.array(sorted(text), pa.string()))
    else:
        hit = pc.is_in(pc.cast(arr, pa.float64()), value_set=pa.array(sorted(nums), pa.float64()))
    return pc.invert(pc.fill_null(hit, False))


def _after_profile(b: pa.RecordBatch, c: str, x: np.ndarray, cl: Cleaning, source: str) -> None:
    """Sentinel codes, unit conversion and other-unit values of one running variable, in place."""
    for v in cl.watch.get(c, ()):
        tally = cl.watched.setdefault(c, {})
        tally[v] = tally.get(v, 0) + int((x == v).sum())
    sent = cl.sentinels.get(c)
    if sent:
        hit = np.isin(x, list(sent))
        if hit.any():
            vals, counts = np.unique(x[hit], return_counts=True)
            tally = cl.sentinel_hits.setdefault(c, {})
            for v, k in zip(vals, counts):
                tally[float(v)] = tally.get(float(v), 0) + int(k)
            x[hit] = np.nan
    uc = cl.units.get(c)
    if uc is not None:
        cells = b.column(b.schema.get_field_index(uc.column))
        if pa.types.is_dictionary(cells.type):
            cells = cells.dictionary_decode()
        spelled = pc.utf8_lower(pc.utf8_trim_whitespace(cells.cast(pa.string())))
        empty = pc.fill_null(pc.is_in(spelled, value_set=pa.array(NULL_TOKENS)), True)
        empty = empty.to_numpy(zero_copy_only=False)
        cl.unit_missing[c] = cl.unit_missing.get(c, 0) + int((empty & ~np.isnan(x)).sum())
        tally = cl.converted.setdefault(c, {})
        for spelling in pc.unique(pc.filter(spelled, pc.invert(pa.array(empty)))).to_pylist():
            unit = uc.spellings.get(spelling) or _unit_name(spelling, uc.quantity)
            if unit is None:
                known = ", ".join(sorted(uc.spellings))
                raise InputError(
                    f"{source}: unit column '{uc.column}' holds {spelling!r}, which is not a "
                    f"unit cutscan knows for '{c}'; add it to unit_map in the [[running]] table "
                    f"of '{c}', e.g. unit_map = {{\"{spelling}\" = \"{uc.target}\"}} "
                    f"(spellings known: {known}).")
            rows = pc.fill_null(pc.equal(spelled, spelling), False).to_numpy(zero_copy_only=False)
            tally[unit] = tally.get(unit, 0) + int((rows & ~np.isnan(x)).sum())
            if not same_unit(unit, uc.target):
                x[rows] = convert_array(x[rows], unit, uc.target, uc.quantity)
    rng = cl.keep_range.get(c)
    if rng is not None:
        out = ~np.isnan(x) & ((x < rng[0]) | (x > rng[1]))
        cl.out_of_range[c] = cl.out_of_range.get(c, 0) + int(out.sum())
        x[out] = np.nan


def _code_hits(arr, with_codes, codes, column, source, roles, reader=None) -> int:
    """How many cells of one batch column a declared code turned into missing."""
    text, _ = split_codes(codes)
    t = arr.type.value_type if pa.types.is_dictionary(arr.type) else arr.type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        s = pc.utf8_trim_whitespace(arr.cast(pa.string()))
        hits = int(pc.sum(pc.is_in(s, value_set=pa.array(sorted(text)))).as_py() or 0) if text else 0
        base = text_to_numbers(arr, column, source, roles.get(column, "scanned"), sorted(text),
                               reader)
        return hits + int(np.isnan(with_codes).sum() - np.isnan(base).sum())
    return int(np.isnan(with_codes).sum() - np.isnan(numeric_plain(arr)).sum())


def numeric_plain(arr) -> np.ndarray:
    """A numeric or boolean array as float64 without any codes."""
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    return pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False).astype(np.float64, copy=False)
