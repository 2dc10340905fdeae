"""The compiled pass's work on one batch's rows, shared by every running variable.

- :func:`into`: a column converted to float64 straight into the pass's buffers, each row at its
  period-half position when the rows are reordered;
- :func:`moved`: a row array in that order;
- :func:`scratch`: a per-thread buffer for a running variable's values;
- :func:`quarters`: calendar quarters of the date column in one compiled loop;
- :func:`check_treatment`: a treatment's values checked to be 0/1 in one compiled loop;
- :func:`fold_together`: every running variable's addends added in one compiled pass per half
  of the rows (:func:`scanner.engines.compiled.fold_rows`).

On the machine we measure on, writing row-sized arrays is the slowest part of the pass; these
helpers write each value once and reuse their buffers between batches.
"""
from __future__ import annotations

import threading

import numpy as np

from ..io import check_binary, numeric
from .compact import Layout


def fold_together(acc: dict, running, parts, groups: np.ndarray, Y: np.ndarray,
                  layout: Layout, pool, kept: list, split: int) -> None:
    """Add a batch's addends to every running variable's totals in one compiled pass per half
    of the rows (:func:`scanner.engines.compiled.fold_rows`): rows ``0..split-1``, then the
    rest.

    The halves are fixed, folded in the pool's two threads when there is one.  ``parts[v]`` is
    None (no finite running value) or (group per row, G, Mx, slots) from
    :meth:`Accumulator.groups <scanner.engines.accumulate.Accumulator.groups>`:

    - Mx None: the groups are the variable's slots, and no slot has rows in both halves (the
      caller splits rows held in order of keys at least as coarse as the variable's).  Both
      threads add straight to the totals, each to its own slots.
    - otherwise: each half adds to its own matrix of the batch's G groups, the second is added
      to the first, and the sums (with n, Σx and Σx² from ``Mx``) are added to the totals'
      slots.  ``kept`` holds the two halves' matrices between batches (fresh ones would cost
      page faults); they take 2 × 1.25 × (these variables' groups) × (3 + w) floats.

    Either way each sum is added in an order that does not depend on the number of threads.
    """
    from numba.typed import List
    from . import compiled
    direct = np.array([p is not None and p[2] is None for p in parts], np.uint8)
    sizes = np.array([0 if p is None or d else p[1] for p, d in zip(parts, direct)], np.int64)
    off = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
    m = groups.shape[1]
    L = layout
    shape = (int(sizes.sum()), 3 + L.w)
    for h in range(2):
        if kept[h] is None or kept[h].size < shape[0] * shape[1]:
            kept[h] = np.empty(shape[0] * shape[1] * 5 // 4)    # room for the next batches' groups
        if kept[2 + h] is None or kept[2 + h].size < shape[0]:
            kept[2 + h] = np.empty(shape[0] * 5 // 4, np.uint8)
    totals = List()
    for v, r in enumerate(running):
        totals.append(acc[r].sums.M if direct[v] else _NO_TOTALS)

    def half(h):
        M = kept[h][:shape[0] * shape[1]].reshape(shape)
        seen = kept[2 + h][:shape[0]]
        seen[:] = 0
        compiled.fold_rows(groups, sizes, off, Y, L.sq, L.cnt, L.pa, L.pb, L.joint,
                           split if h else 0, m if h else split, M, seen, direct, totals)
        return M, seen
    (first, seen_a), (second, seen_b) = pool.map(half, (0, 1)) if pool else map(half, (0, 1))
    if shape[0]:
        compiled.merge_halves(first, seen_a, second, seen_b)

    def to_totals(v):
        # each variable adds to its own totals: the variables are spread over the threads
        p = parts[v]
        a = acc[running[v]]
        if p is not None and not direct[v]:
            _, G, Mx, slot = p
            Mc = first[off[v]:off[v] + G]
            Mc[:, :3] = Mx
            compiled.scatter_add(a.sums.M, slot, Mc)
        a.sums.touch()
        a.add(None)
    list(pool.map(to_totals, range(len(parts))) if pool else map(to_totals, range(len(parts))))


_NO_TOTALS = np.zeros((0, 1))


def moved(values: np.ndarray, dest: np.ndarray) -> np.ndarray:
    """A copy of ``values`` with each row at its position ``dest``."""
    from . import compiled
    out = np.empty_like(values)
    compiled.scatter_rows(values.reshape(1, -1), dest, out.reshape(1, -1))
    return out


def into(batch, name: str, source: str, role: str, out: np.ndarray, dest) -> np.ndarray:
    """Column ``name`` of ``batch`` as float64 in ``out`` (each row at its position ``dest``
    when given), as :func:`scanner.io.numeric` converts it.

    Integers of up to 32 bits and floats with no missing value are read where they lie and
    converted as they are copied; anything else goes through ``numeric`` first.  Writing
    row-sized arrays is the slowest part of the pass, and this saves one per column.
    """
    from . import compiled
    arr = batch.column(batch.schema.get_field_index(name))
    if arr.null_count == 0 and arr.type in _EXACT:
        src = arr.to_numpy(zero_copy_only=True)
    else:
        src = numeric(batch, name, source, role)
    if dest is None:
        np.copyto(out, src, casting="unsafe")      # every value of these types is exact
    else:
        compiled.scatter_rows(src.reshape(1, -1), dest, out.reshape(1, -1))
    return out


def as_is(batch, name: str, dest):
    """Column ``name`` of ``batch`` as a read-only view of its buffer where it needs neither
    conversion nor moving (float64 with no missing value, rows in file order), else None.

    A running variable's values are only read (coded, and summed into n, Σx, Σx²), so copying
    them into a buffer first, as the other columns must be, wrote 8 bytes a row for nothing.
    """
    if dest is not None:
        return None
    import pyarrow as pa
    arr = batch.column(batch.schema.get_field_index(name))
    if arr.null_count or arr.type != pa.float64():
        return None
    return arr.to_numpy(zero_copy_only=True)


def check_treatment(values: np.ndarray, column: str, source: str) -> None:
    """:func:`scanner.io.check_binary` in one compiled pass over the values (numpy's check makes
    three temporaries of the batch); its message where a value is not 0/1."""
    from . import compiled
    if not compiled.zero_one(values):
        check_binary(values, column, source)


def _exact_types():
    import pyarrow as pa
    return frozenset((pa.int8(), pa.int16(), pa.int32(), pa.uint8(), pa.uint16(), pa.uint32(),
                      pa.float32(), pa.float64()))


_EXACT = _exact_types()


def scratch(m: int, dtype=np.float64) -> np.ndarray:
    """This thread's buffer of ``m`` values of ``dtype``, valid until the thread's next call
    for that type (a running variable's values and grid keys are used only while its codes are
    formed; fresh pages for every variable and batch cost more than the values)."""
    key = np.dtype(dtype).str
    buf = _SCRATCH.__dict__.get(key)
    if buf is None or buf.size < m:
        buf = _SCRATCH.__dict__[key] = np.empty(m, dtype)
    return buf[:m]


_SCRATCH = threading.local()


def release() -> None:
    """Drop this thread's scratch buffers (the pass's worker threads end with it)."""
    _SCRATCH.__dict__.clear()


def quarters(batch, column: str, source: str) -> np.ndarray:
    """:func:`scanner.io.period_codes` of a batch's date column: through one compiled loop for
    dates and time stamps with no time zone and no missing value (most registry dates), where
    pyarrow's year and quarter functions make several temporaries of the batch."""
    import pyarrow as pa
    from . import compiled
    from ..io import period_codes
    arr = batch.column(batch.schema.get_field_index(column))
    t = arr.type
    per_day = None
    if pa.types.is_date32(t):
        per_day, raw = 1, pa.int32()
    elif pa.types.is_date64(t):
        per_day, raw = 86_400_000, pa.int64()
    elif pa.types.is_timestamp(t) and t.tz is None:
        per_day, raw = 86_400 * _PER_SECOND[t.unit], pa.int64()
    if per_day is None or arr.null_count:
        return period_codes(batch, column, source)
    return compiled.quarter_codes(arr.view(raw).to_numpy(), per_day)


_PER_SECOND = {"s": 1, "ms": 1_000, "us": 1_000_000, "ns": 1_000_000_000}
