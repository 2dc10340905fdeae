"""The addends of one batch, laid out once and shared by every running variable.

Each running variable adds, per row, the row count, x, x² and for every tracked column its
presence, y and y² (and for every column pair the six joint sums) to its bin's totals — 27 sums
per row for 8 columns, ten times over for ten running variables.  Many of them are known
without adding:

* y² of a column whose finite values in the batch are all 0 or 1 (every treatment) is y;
* the count of finite values of a column with no missing value in the batch is the row count;
* a pair of such columns has its joint count, sums and squares in the columns' own sums.

:class:`Addends` keeps only the rest in one row-major matrix ``W`` (filled by
:func:`scanner.engines.compiled.compact_rows`) and a map ``src`` from every sum of the totals'
layout (:mod:`scanner.engines.sums`) to the column of the per-group matrix
``[n, Σx, Σx², ΣW]`` that holds it.  The identities are exact (y² = y for y in {0, 1}; a count
of finite values equals the rows when none is missing), so the totals are the same sums.
"""
from __future__ import annotations

import numpy as np

HALVES_FROM = 100_000      # rows from which the addends are filled in two threads


class Addends:
    """One batch's addends: ``W`` (rows × w) and the layout map ``src``.

    Parameters
    ----------
    Y : (k, rows) float64 tracked columns of the batch.
    pa, pb : column positions of the pairs that need joint sums.
    known : per column, True where it is known to be 0/1 already (treatments, checked on read).
    buffer : a float64 array to reuse for ``W`` when it is large enough (saves page faults).
    pool : a thread pool to fill ``W`` in two halves (the compiled loop releases the GIL).
    """

    def __init__(self, Y: np.ndarray, pa: np.ndarray, pb: np.ndarray, known, buffer=None,
                 pool=None):
        from . import compiled
        k, m = Y.shape
        # A column's sum is finite only when every value is (a huge sum that overflows merely
        # counts the column as incomplete, which is never wrong).
        full_col = np.isfinite(Y.sum(axis=1))
        binary = compiled.binary_columns(Y, np.asarray(known, np.bool_))
        sq = np.flatnonzero(~binary).astype(np.int64)
        cnt = np.flatnonzero(~full_col).astype(np.int64)
        # pairs with a missing value somewhere need their own joint count, sums and squares
        joint = ~(full_col[pa] & full_col[pb]) if pa.size else np.zeros(0, bool)
        w = k + sq.size + cnt.size + pa.size + 5 * int(joint.sum())
        if buffer is not None and buffer.size >= m * w:
            self.W = buffer[:m * w].reshape(m, w)
        else:
            self.W = np.empty((m, w))
        if pool is not None and m > HALVES_FROM:     # two halves of the rows, one per thread
            h = m // 2
            list(pool.map(lambda s: compiled.compact_rows(Y[:, s], sq, cnt, pa, pb, joint,
                                                          self.W[s]),
                          (slice(0, h), slice(h, m))))
        else:
            compiled.compact_rows(Y, sq, cnt, pa, pb, joint, self.W)
        self.buffer = buffer if buffer is not None and buffer.size >= m * w else self.W.ravel()
        self.src = _layout(k, sq, cnt, pa, pb, joint)


def _layout(k, sq, cnt, pa, pb, joint) -> np.ndarray:
    """Column of ``[n, Σx, Σx², ΣW]`` holding each sum of the layout n, Σx, Σx², counts (k),
    Σy (k), Σy² (k), then per pair n, Σa, Σb, Σa², Σb², Σab (p each)."""
    s1 = 3 + np.arange(k)                                  # Σy of column j
    s2 = s1.copy()                                         # Σy²: Σy for 0/1 columns
    s2[sq] = 3 + k + np.arange(sq.size)
    c = np.zeros(k, np.int64)                              # count: the row count n if complete
    c[cnt] = 3 + k + sq.size + np.arange(cnt.size)
    p = pa.size
    pn, pA, pB, pAA, pBB, pAB = (np.zeros(p, np.int64) for _ in range(6))
    at = 3 + k + sq.size + cnt.size
    for q in range(p):
        pAB[q] = at
        at += 1
        if joint[q]:
            pn[q], pA[q], pB[q], pAA[q], pBB[q] = range(at, at + 5)
            at += 5
        else:
            pn[q], pA[q], pB[q] = 0, s1[pa[q]], s1[pb[q]]
            pAA[q], pBB[q] = s2[pa[q]], s2[pb[q]]
    return np.concatenate([[0, 1, 2], c, s1, s2, pn, pA, pB, pAA, pBB, pAB]).astype(np.int64)
