"""Compiled loops of the local binning pass (numba, CPU only).

Two loops per running variable and batch, both over the rows in order:

1. :func:`local_groups` gives each row the batch-local group of its (bin, period-half) pair
   through a dense look-up table of ``bins × period-half codes`` (both small ranges within a
   batch), numbering groups in order of first appearance;
2. :func:`add_rows` adds every row's n, x, x², and for each tracked column its presence, y and
   y² (and the joint sums of the column pairs) straight into the running totals' slot of its
   group (:class:`scanner.engines.sums.SlotSums`).

Nothing of size rows × columns is built: the numpy kernels of :mod:`scanner.engines.local`
first lay the batch out as an addend matrix and a one-hot product, which took more time than
the sums themselves.  Each slot's sums are accumulated in row order, so the totals equal the
numpy kernels' up to the order of floating-point additions (agreement to 1e-9 is tested).
The loops release the GIL, so two running variables can be folded at once in two threads.
Compiled code is cached on disk (``cache=True``): only the first run on a machine compiles.
"""
from __future__ import annotations

import numpy as np
from numba import njit


@njit(nogil=True, cache=True)
def local_groups(g, nb, ext, span):
    """Batch-local group of each row (-1 where ``g == nb``: no finite running value).

    ``g``: bin code per row (0..nb-1, nb = dropped); ``ext``: period-half code per row
    (0..span-1), or an empty array when there are none.  Returns (group per row, the combined
    code ``bin * span + ext`` of each group in order of first appearance).
    """
    m = g.size
    lut = np.full(nb * span, -1, np.int64)
    out = np.empty(m, np.int64)
    first = np.empty(min(m, nb * span), np.int64)
    k = 0
    keyed = ext.size > 0
    for i in range(m):
        b = g[i]
        if b >= nb:
            out[i] = -1
            continue
        c = b * span + (ext[i] if keyed else 0)
        s = lut[c]
        if s < 0:
            s = k
            lut[c] = k
            first[k] = c
            k += 1
        out[i] = s
    return out, first[:k]


@njit(nogil=True, cache=True)
def add_rows(group, slot, x, Y, pa, pb, M):
    """Add each row's sums to row ``slot[group[i]]`` of ``M`` (rows with group -1 are skipped).

    Layout of a row of ``M`` (k tracked columns, p pairs): n, Σx, Σx², then per column the
    count of finite values, Σy, Σy², then per pair (a, b) over rows where both are finite:
    n, Σa, Σb, Σa², Σb², Σab.  ``Y`` is (k, rows); a non-finite y counts as missing.
    """
    m = group.size
    k = Y.shape[0]
    p = pa.size
    c0 = 3
    c1 = 3 + k
    c2 = 3 + 2 * k
    q0 = 3 + 3 * k
    for i in range(m):
        gi = group[i]
        if gi < 0:
            continue
        s = slot[gi]
        xi = x[i]
        M[s, 0] += 1.0
        M[s, 1] += xi
        M[s, 2] += xi * xi
        for j in range(k):
            v = Y[j, i]
            if v - v == 0.0:
                M[s, c0 + j] += 1.0
                M[s, c1 + j] += v
                M[s, c2 + j] += v * v
        for q in range(p):
            a = Y[pa[q], i]
            b = Y[pb[q], i]
            if a - a == 0.0 and b - b == 0.0:
                M[s, q0 + q] += 1.0
                M[s, q0 + p + q] += a
                M[s, q0 + 2 * p + q] += b
                M[s, q0 + 3 * p + q] += a * a
                M[s, q0 + 4 * p + q] += b * b
                M[s, q0 + 5 * p + q] += a * b


@njit(nogil=True, cache=True)
def order_by(code, span):
    """Stable permutation putting rows in order of ``code`` (0..span-1): a counting sort.

    Folding a batch in this order keeps the slots a running variable touches at one time to
    those of one period-half code, which fit in the processor's cache; rows scattered over all
    (bin, period, half) slots spend most of their time waiting for memory.
    """
    count = np.zeros(span + 1, np.int64)
    for i in range(code.size):
        count[code[i] + 1] += 1
    for c in range(span):
        count[c + 1] += count[c]
    out = np.empty(code.size, np.int64)
    for i in range(code.size):
        c = code[i]
        out[count[c]] = i
        count[c] += 1
    return out


@njit(nogil=True, cache=True)
def decimal_ints(x, ok, s):
    """(k, True) with k = x·s exactly a whole number for every row with ``ok``; (_, False) if not."""
    m = x.size
    k = np.zeros(m, np.int64)
    for i in range(m):
        if ok[i]:
            v = np.rint(x[i] * s)
            if not abs(v) < 4503599627370496.0 or v / s != x[i]:
                return k, False
            k[i] = np.int64(v)
    return k, True


@njit(nogil=True, cache=True)
def dense_codes(k, ok):
    """Group codes of whole-number keys through a dense table, as ``local._codes`` does.

    Returns (codes with nb where not ``ok``, sorted distinct keys, nb, dense) — ``dense`` False
    (and nothing else) when the keys spread over more than 4·rows + 1024 values.
    """
    m = k.size
    lo = np.int64(0)
    hi = np.int64(-1)
    n = 0
    for i in range(m):
        if ok[i]:
            v = k[i]
            if n == 0 or v < lo:
                lo = v
            if n == 0 or v > hi:
                hi = v
            n += 1
    none = np.zeros(0, np.int64)
    if n == 0:
        return np.zeros(m, np.int64), none, 0, True
    if hi - lo > 4 * n + 1024:
        return none, none, 0, False
    size = hi - lo + 1
    lut = np.zeros(size, np.int64)
    for i in range(m):
        if ok[i]:
            lut[k[i] - lo] = 1
    nb = 0
    uniq = np.empty(size, np.int64)
    for j in range(size):
        if lut[j]:
            lut[j] = nb
            uniq[nb] = j + lo
            nb += 1
    g = np.empty(m, np.int64)
    for i in range(m):
        g[i] = lut[k[i] - lo] if ok[i] else nb
    return g, uniq[:nb], nb, True
