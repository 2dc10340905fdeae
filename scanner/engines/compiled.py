"""Compiled loops of the local binning pass (numba, CPU only).

Per running variable and batch:

1. :func:`finite_counts` and :func:`decimal_codes` (exact values) or :func:`grid_keys` with
   :func:`dense_codes` (grid bins) turn the values into int32 bin codes, each in one pass over
   the rows where numpy would make a temporary array per operation;
2. :func:`local_groups` gives each row the batch-local group of its (bin, period-half) pair
   through a dense look-up table of ``bins × period-half codes`` (both small ranges within a
   batch), numbering groups by period-half code, then bin (without period or half keys the bin
   codes are the groups and this loop is skipped); where the rows go straight to the totals
   (below), :func:`to_slots` replaces each group by its slot in them;
3. :func:`add_n_x` (or :func:`to_slots`) adds each row's 1, x and x² to its group (or slot).

Then, once per batch for every running variable together, :func:`fold_rows` forms the addends
of a block of rows in the cache — only those not known already: y² of a 0/1 column is y, and
the count of a column with no missing value is the row count (:mod:`scanner.engines.compact`)
— and adds them to each variable's groups.  With period or half keys the rows are first moved
to their period-half order (:func:`sorted_positions`, :func:`scatter_rows`) and the two threads
take the rows on either side of a change of code near the middle: a variable keyed at least
that finely has no group on both sides, so its rows go straight to its running totals'
slots (:class:`scanner.engines.sums.SlotSums`).  Otherwise each thread adds its half of the
rows to its own matrix of the batch's groups, and the two matrices' sums go to the slots
(:func:`merge_halves`, :func:`scatter_add`).

On the 2-core machine we measure on, writing row-sized arrays is the slowest thing the pass
does, so the loops write as few as they can: keys are computed again rather than stored, codes
are int32 and land directly in the buffer the fold reads.  Each group's n, Σx and Σx² are
accumulated in the order the pass holds its rows (period-half order when they are moved), its
other sums in that order within each of two fixed halves of the batch's positions (not the
held-out discovery halves), so the totals equal the numpy kernels' up to the order of
floating-point additions (agreement to 1e-9 is tested) and do not depend on the number of
threads (tested bit for bit).  The loops release the GIL.  Compiled code is cached on disk
(``cache=True``): only the first run on a machine compiles.
"""
from __future__ import annotations

import numpy as np
from numba import njit

_NO_X = np.zeros(0)


@njit(nogil=True, cache=True)
def local_groups(g, nb, ext, span, out, lut, first):
    """Batch-local group of each row (-1 where ``g == nb``: no finite running value), written
    to ``out`` (which may be ``g`` itself: each row's code is read before it is replaced).

    ``g``: bin code per row (0..nb-1, nb = dropped); ``ext``: period-half code per row
    (0..span-1), or an empty array when there are none.  Returns (group per row, the combined
    code ``bin * span + ext`` of each group, a view of ``first``).

    Groups are numbered period-half by period-half, bins in order within each (the bin codes
    are in order of their keys): the totals give a variable's first batch its slots in the
    same order, so adding every later batch to them (:func:`scatter_add`) walks the totals
    forwards instead of jumping between distant rows (numbered in order of first appearance,
    the 10M-row keyed pass spent 0.5 s of CPU there).

    ``lut`` (int32, at least ``nb * span`` entries, all -1) and ``first`` (int64, at least
    ``min(rows, nb * span)``) are the caller's, kept between batches: fresh ones cost page
    faults on every call (about 2 MB each for a continuous running variable with year keys).
    The table is indexed ``ext * nb + bin``, so numbering reads it once, front to back (indexed
    bin-major, numbering in this order read it with a stride of ``span`` entries: slower than
    numbering in order of first appearance on the irregular table's skewed lab values).  The
    entries used are set back to -1 before returning.
    """
    m = g.size
    keyed = ext.size > 0
    for i in range(m):                      # mark the (period-half, bin) cells that occur
        b = g[i]
        if b < nb:
            lut[(ext[i] if keyed else 0) * nb + b] = -2
    k = 0
    for c in range(nb * span):              # in order: period-half by period-half, then bin
        if lut[c] == -2:
            lut[c] = k
            first[k] = (c % nb) * span + c // nb
            k += 1
    for i in range(m):
        b = g[i]
        out[i] = -1 if b >= nb else lut[(ext[i] if keyed else 0) * nb + b]
    for j in range(k):
        f = first[j]
        lut[(f % span) * nb + f // span] = -1
    return out, first[:k]


@njit(nogil=True, cache=True)
def zero_one(values):
    """Every value is 0, 1 or NaN (a treatment's values; stops after the block of 4096 that
    holds the first other).  The test is counted without branching, so the compiler
    vectorises it: 0.5 ms a million values where stopping at each one took 3.7 ms."""
    n = values.size
    for s in range(0, n, 4096):
        bad = 0
        for i in range(s, min(n, s + 4096)):
            v = values[i]
            bad += (v != 0.0) & (v != 1.0) & (v == v)
        if bad:
            return False
    return True


@njit(nogil=True, cache=True)
def binary_columns(Y, known):
    """Per tracked column of a batch: every finite value is 0 or 1 (stops at the first other;
    columns with ``known`` set were checked already)."""
    k, m = Y.shape
    binary = np.ones(k, np.bool_)
    for j in range(k):
        if known[j]:
            continue
        for i in range(m):
            v = Y[j, i]
            if v - v == 0.0 and v != 0.0 and v != 1.0:
                binary[j] = False
                break
    return binary


@njit(nogil=True, cache=True)
def _addends(Y, s, e, sq, cnt, pa, pb, joint, W):
    """Fill rows 0..e-s of ``W`` with the addends of batch rows s..e-1 that are not known
    already (see :mod:`scanner.engines.compact`).

    Columns, in order: y of every tracked column (0 where not finite); y² of the columns in
    ``sq``; the finite indicator of the columns in ``cnt``; per pair q the product ab over rows
    where both are finite, and when ``joint[q]`` also that row's n, a, b, a², b².
    """
    k = Y.shape[0]
    for i in range(s, e):
        r = i - s
        for j in range(k):
            v = Y[j, i]
            W[r, j] = v if v - v == 0.0 else 0.0
        c = k
        for t in range(sq.size):
            v = W[r, sq[t]]
            W[r, c] = v * v
            c += 1
        for t in range(cnt.size):
            v = Y[cnt[t], i]
            W[r, c] = 1.0 if v - v == 0.0 else 0.0
            c += 1
        for q in range(pa.size):
            a = Y[pa[q], i]
            b = Y[pb[q], i]
            both = a - a == 0.0 and b - b == 0.0
            W[r, c] = a * b if both else 0.0
            c += 1
            if joint[q]:
                if both:
                    W[r, c] = 1.0
                    W[r, c + 1] = a
                    W[r, c + 2] = b
                    W[r, c + 3] = a * a
                    W[r, c + 4] = b * b
                else:
                    for u in range(5):
                        W[r, c + u] = 0.0
                c += 5


BLOCK = 4096    # rows whose addends are formed at a time: 4096 × w floats stay in the cache


@njit(nogil=True, cache=True)
def fold_rows(groups, sizes, off, Y, sq, cnt, pa, pb, joint, start, stop, M, seen, direct,
              totals):
    """Add the addends of batch rows start..stop-1 to every running variable's groups.

    ``groups[v, i]`` is row i's group of running variable v (skipped when negative or, unless
    ``direct[v]``, not below ``sizes[v]``: no finite running value).

    - ``direct[v]``: the group is a slot of the variable's running totals ``totals[v]``
      (slots × [n, Σx, Σx², addends]), and the addends go straight to columns 3.. of it.  The
      caller gives each thread rows whose slots no other thread touches.
    - otherwise: to columns 3.. of row ``off[v] + group`` of ``M`` (the batch's groups of these
      variables × [n, Σx, Σx², addends]).  A row of ``M`` is written, not added to, the first
      time it is reached (``seen``, zeros on entry, marks it): zeroing every group's row
      beforehand cost as much as the adding with 10^5 groups.  Rows never reached hold
      anything; :func:`merge_halves` reads only the others.

    The addends of a block of rows are formed once, in the cache, and added for every running
    variable before the next block: formed for the whole batch they would be read from memory
    once per running variable.
    """
    V = groups.shape[0]
    w = M.shape[1] - 3
    W = np.empty((BLOCK, w))
    for s in range(start, stop, BLOCK):
        e = min(stop, s + BLOCK)
        _addends(Y, s, e, sq, cnt, pa, pb, joint, W)
        for v in range(V):
            if direct[v]:
                T = totals[v]
                for i in range(s, e):
                    gi = groups[v, i]
                    if gi < 0:
                        continue
                    r = i - s
                    for j in range(w):
                        T[gi, 3 + j] += W[r, j]
                continue
            o = off[v]
            G = sizes[v]
            for i in range(s, e):
                gi = groups[v, i]
                if gi < 0 or gi >= G:
                    continue
                row = o + gi
                r = i - s
                if seen[row]:
                    for j in range(w):
                        M[row, 3 + j] += W[r, j]
                else:
                    seen[row] = 1
                    for j in range(w):
                        M[row, 3 + j] = W[r, j]


@njit(nogil=True, cache=True)
def merge_halves(A, seen_a, B, seen_b):
    """``A += B`` over columns 3.. for the rows each half reached (:func:`fold_rows`); a row
    reached only by the second half takes its values.  Every group has rows, so every row of
    the result was reached by one half at least."""
    for r in range(A.shape[0]):
        if seen_b[r]:
            if seen_a[r]:
                for j in range(3, A.shape[1]):
                    A[r, j] += B[r, j]
            else:
                for j in range(3, A.shape[1]):
                    A[r, j] = B[r, j]


@njit(nogil=True, cache=True)
def add_n_x(group, x, Mx):
    """Add each row's 1, x and x² to row ``group[i]`` of ``Mx`` (skipped unless 0 <= group <
    the rows of ``Mx``: no finite running value)."""
    G = Mx.shape[0]
    for i in range(group.size):
        gi = group[i]
        if gi < 0 or gi >= G:
            continue
        xi = x[i]
        Mx[gi, 0] += 1.0
        Mx[gi, 1] += xi
        Mx[gi, 2] += xi * xi


@njit(nogil=True, cache=True)
def scatter_add(M, slot, Mc):
    """``M[slot[g]] += Mc[g]`` for every group g (``slot`` holds distinct rows; no temporary of
    groups × columns)."""
    w = M.shape[1]
    for g in range(slot.size):
        s = slot[g]
        for c in range(w):
            M[s, c] += Mc[g, c]


@njit(nogil=True, cache=True)
def to_slots(group, slot, x, M):
    """Replace each row's group by its slot in the running totals, in place, and add the row's
    1, x and x² to that slot's row of ``M`` (slots × 3: the totals' n, Σx and Σx², held apart,
    :class:`scanner.engines.sums.SlotSums`); -1 unless 0 <= group < the groups (no finite
    running value)."""
    G = slot.size
    for i in range(group.size):
        g = group[i]
        if g < 0 or g >= G:
            group[i] = -1
            continue
        s = slot[g]
        group[i] = s
        xi = x[i]
        M[s, 0] += 1.0
        M[s, 1] += xi
        M[s, 2] += xi * xi


@njit(nogil=True, cache=True)
def sorted_positions(code, span):
    """Each row's position once the rows are put in order of ``code`` (0..span-1), stably: a
    counting sort's destinations.

    Folding a batch in this order keeps the slots a running variable touches at one time to
    those of one period-half code, which fit in the processor's cache; rows scattered over all
    (bin, period, half) slots spend most of their time waiting for memory.  Moving rows to
    their destinations (:func:`scatter_rows`) writes ``span`` sequential streams, where taking
    them in sorted order would read every row from a random place.
    """
    count = np.zeros(span + 1, np.int64)
    for i in range(code.size):
        count[code[i] + 1] += 1
    for c in range(span):
        count[c + 1] += count[c]
    dest = np.empty(code.size, np.int64)
    for i in range(code.size):
        c = code[i]
        dest[i] = count[c]
        count[c] += 1
    return dest


@njit(nogil=True, cache=True)
def scatter_rows(src, dest, out):
    """``out[j, dest[i]] = src[j, i]`` for every row j of the 2-D arrays."""
    for j in range(src.shape[0]):
        for i in range(src.shape[1]):
            out[j, dest[i]] = src[j, i]


@njit(nogil=True, cache=True)
def _quarter_of_day(day):
    """Quarter code (year·4 + quarter − 1) of a day number (days since 1970-01-01), proleptic
    Gregorian, by H. Hinnant's days-to-civil algorithm ("chrono-compatible low-level date
    algorithms") in whole numbers."""
    z = day + 719468
    era = z // 146097
    doe = z - era * 146097
    yoe = (doe - doe // 1460 + doe // 36524 - doe // 146096) // 365
    doy = doe - (365 * yoe + yoe // 4 - yoe // 100)
    mp = (5 * doy + 2) // 153
    month = mp + 3 if mp < 10 else mp - 9
    year = yoe + era * 400 + (1 if month <= 2 else 0)
    return year * 4 + (month - 1) // 3


@njit(nogil=True, cache=True)
def quarter_codes(values, per_day):
    """Calendar quarter codes (year·4 + quarter − 1) of dates given as whole days since
    1970-01-01 (``per_day`` 1) or timestamps in units of 1/``per_day`` day, as pyarrow's
    ``year`` and ``quarter`` count them (tested against them).

    Dates go through a table of the batch's range of days (a registry batch spans a few
    thousand days, so each row costs one look-up instead of eight divisions); time stamps and
    dates too spread out for a table are converted one by one.
    """
    m = values.size
    out = np.empty(m, np.int32)
    if m == 0:
        return out
    if per_day == 1:
        lo = np.int64(values[0])
        hi = lo
        for i in range(m):
            lo = min(lo, np.int64(values[i]))
            hi = max(hi, np.int64(values[i]))
        if hi - lo <= 4 * m + 1024:
            table = np.empty(hi - lo + 1, np.int32)
            for j in range(hi - lo + 1):
                table[j] = _quarter_of_day(lo + j)
            for i in range(m):
                out[i] = table[np.int64(values[i]) - lo]
            return out
    for i in range(m):
        out[i] = _quarter_of_day(np.int64(values[i]) // per_day)
    return out


@njit(nogil=True, cache=True)
def row_halves(start, m, seed):
    """``local.half_split`` of the row positions start..start+m-1 in one loop (the same
    splitmix64 finaliser in wrapping unsigned arithmetic; the numpy version makes a dozen
    temporaries of the batch)."""
    out = np.empty(m, np.int8)
    base = np.uint64(seed) * np.uint64(0x9E3779B97F4A7C15)
    one = np.uint64(1)
    for i in range(m):
        z = np.uint64(start + i) + base
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        z = z ^ (z >> np.uint64(31))
        out[i] = np.int8(z & one)
    return out


@njit(nogil=True, cache=True)
def period_keys(quarter, year, half):
    """``local.keyed`` of the periods of quarter codes (whole years when ``year``; -1 or an
    empty ``quarter``: no period) and the halves (empty: none), in two loops: (code per row,
    number of codes, first period)."""
    m = quarter.size if quarter.size else half.size
    p0 = np.int64(2 ** 62)
    for i in range(quarter.size):
        q = np.int64(quarter[i])
        if q >= 0:
            p0 = min(p0, q // 4 * 4 if year else q)
    if p0 == 2 ** 62:
        p0 = 0
    ext = np.empty(m, np.int32)
    top = 0
    for i in range(m):
        q = np.int64(quarter[i]) if quarter.size else np.int64(-1)
        r = ((q // 4 * 4 if year else q) - p0 + 1) if q >= 0 else 0
        e = r * 3 + (np.int64(half[i]) + 1 if half.size else 0)
        ext[i] = e
        top = max(top, e)
    return ext, top + 1, p0


@njit(nogil=True, cache=True)
def finite_counts(x):
    """(finite mask, NaN count, ±inf count) of a running variable's values, in one pass."""
    m = x.size
    ok = np.empty(m, np.bool_)
    nan = 0
    inf = 0
    for i in range(m):
        v = x[i]
        f = v - v == 0.0
        ok[i] = f
        if not f:
            if v != v:
                nan += 1
            else:
                inf += 1
    return ok, nan, inf


@njit(nogil=True, cache=True)
def grid_keys(x, ok, w, p, ten, pw, limit, out):
    """:func:`scanner.engines.grid.keys` of the rows with ``ok`` (0 elsewhere), in one pass,
    written to ``out`` (int64, one per row).

    The same operations in the same order (edges ``k·p / ten`` when ``ten > 0``, else
    ``k·pw``), so the keys are identical; the numpy version makes ten temporaries of the batch.
    """
    m = x.size
    for i in range(m):
        if not ok[i]:
            out[i] = 0
            continue
        v = x[i]
        k = np.floor(v / w)
        e = (k * p) / ten if ten > 0.0 else k * pw
        if e > v:
            k -= 1.0
        e = ((k + 1.0) * p) / ten if ten > 0.0 else (k + 1.0) * pw
        if e <= v:
            k += 1.0
        if k > limit:
            k = limit
        elif k < -limit:
            k = -limit
        out[i] = np.int64(k)
    return out


@njit(nogil=True, cache=True)
def decimal_codes(x, ok, s, out):
    """:func:`dense_codes` of ``k = x·s`` when that is exactly a whole number for every row with
    ``ok``, in one pass less: returns (codes, written to ``out``; sorted distinct k; nb; status)
    with status 0 (done), 1 (some x·s is not whole: the rest is not to be used) or 2 (whole,
    but too spread for a dense table).

    The first pass has no branch the compiler cannot turn into vector instructions (counting
    the rows that fail instead of stopping at the first), several times faster on the rows of
    a registry; a look at the first finite values stops early on values that are not short
    decimals at all.
    """
    m = x.size
    none = np.zeros(0, np.int64)
    seen = 0
    for i in range(m):                     # early exit on continuous values
        if ok[i]:
            v = np.rint(x[i] * s)
            if not abs(v) < 4503599627370496.0 or v / s != x[i]:
                return out, none, 0, 1
            seen += 1
            if seen == 64:
                break
    # Bounds are kept as whole numbers and failures counted with & and |, so the loop has no
    # branch: the compiler turns it into vector instructions (bounds kept as floats it did
    # not: a float minimum must respect NaN, and the loop ran three times slower).  The keys
    # are not written out: the table computes them again from x.
    far = np.int64(1) << 62
    lo = far
    hi = -far
    n = 0
    bad = 0
    for i in range(m):
        xv = x[i]
        v = np.rint(xv * s)
        use = ok[i]
        fits = abs(v) < 4503599627370496.0
        bad += use & ((not fits) | (v / s != xv))     # v / 1 is v: one form for every scale
        n += use
        kv = np.int64(v if (use & fits) else 0.0)
        lo = min(lo, kv if use else far)
        hi = max(hi, kv if use else -far)
    if bad:
        return out, none, 0, 1
    if n == 0:
        out[:] = 0
        return out, none, 0, 0
    if hi - lo > 4 * n + 1024:
        return out, none, 0, 2
    g, uniq, nb = _dense_table(none, x, s, ok, lo, hi, out)
    return g, uniq, nb, 0


@njit(nogil=True, cache=True)
def dense_codes(k, ok, out):
    """Group codes of whole-number keys through a dense table, as ``local._codes`` does.

    Returns (codes with nb where not ``ok``, written to ``out``; sorted distinct keys; nb;
    dense) — ``dense`` False (the rest not to be used) when the keys spread over more than
    4·rows + 1024 values.
    """
    m = k.size
    lo = np.int64(4611686018427387904)
    hi = np.int64(-4611686018427387904)
    n = 0
    for i in range(m):
        if ok[i]:
            lo = min(lo, k[i])
            hi = max(hi, k[i])
            n += 1
    none = np.zeros(0, np.int64)
    if n == 0:
        out[:] = 0
        return out, none, 0, True
    if hi - lo > 4 * n + 1024:
        return out, none, 0, False
    g, uniq, nb = _dense_table(k, _NO_X, 1.0, ok, lo, hi, out)
    return g, uniq, nb, True


@njit(nogil=True, cache=True)
def _dense_table(k, x, s, ok, lo, hi, g):
    """Codes 0..nb-1 of the keys (rows with ``ok``; lo..hi), nb elsewhere, and the sorted
    distinct keys, through a table of hi − lo + 1 entries; the codes are written to ``g``.

    The keys are ``k``, or when ``k`` is empty ``rint(x·s)`` computed again on each pass:
    writing them out would cost more than reading ``x`` twice more (writes of row-sized arrays
    are the slowest part of the pass).
    """
    m = ok.size
    given = k.size > 0
    size = hi - lo + 1
    lut = np.zeros(size, np.int64)
    for i in range(m):
        if ok[i]:
            kv = k[i] if given else np.int64(np.rint(x[i] * s))
            lut[kv - lo] = 1
    nb = 0
    uniq = np.empty(size, np.int64)
    for j in range(size):
        if lut[j]:
            lut[j] = nb
            uniq[nb] = j + lo
            nb += 1
    for i in range(m):
        if ok[i]:
            kv = k[i] if given else np.int64(np.rint(x[i] * s))
            g[i] = lut[kv - lo]
        else:
            g[i] = nb
    return g, uniq[:nb], nb
