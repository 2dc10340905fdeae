"""Spec-driven cleaning of a table, batch by batch: declared missing codes, decimal marks,
value maps and dates (always), then — once the data-quality profile of the first rows is in —
missing-value codes, row-by-row units and values that fit only another unit (scanner.quality).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .errors import InputError
from .io import Table, numeric
from .parsing import (NULL_TOKENS, DateParser, NumberReader, apply_value_map, split_codes,
                      text_to_numbers, to_timestamps)
from .units import convert_array, same_unit


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
                               reader, count=False)     # the cells were counted when parsed
        return hits + int(np.isnan(with_codes).sum() - np.isnan(base).sum())
    return int(np.isnan(with_codes).sum() - np.isnan(numeric_plain(arr)).sum())


def numeric_plain(arr) -> np.ndarray:
    """A numeric or boolean array as float64 without any codes."""
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    return pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False).astype(np.float64, copy=False)
