"""The addends of one batch, laid out once and shared by every running variable.

Each running variable adds, per row, the row count, x, x² and for every tracked column its
presence, y and y² (and for every column pair the six joint sums) to its bin's totals — 27 sums
per row for 8 columns, ten times over for ten running variables.  Many of them are known
without adding:

* y² of a column whose finite values in the batch are all 0 or 1 (every treatment) is y;
* the count of finite values of a column with no missing value in the batch is the row count;
* a pair of such columns has its joint count, sums and squares in the columns' own sums.

:class:`Layout` lists only the rest — the addends :func:`scanner.engines.compiled.fold_rows` forms
block by block — and a map ``src`` from every sum of the totals' layout
(:mod:`scanner.engines.sums`) to the column of the per-group matrix ``[n, Σx, Σx², ΣW]`` that
holds it.  The identities are exact (y² = y for y in {0, 1}; a count
of finite values equals the rows when none is missing), so the totals are the same sums.
"""
from __future__ import annotations

import numpy as np


class Layout:
    """Which addends a batch needs, and where each sum of the totals' layout is found.

    Parameters
    ----------
    Y : (k, rows) float64 tracked columns of the batch.
    pa, pb : column positions of the pairs that need joint sums.
    known : per column, True where it is known to be 0/1 already (treatments, checked on read).

    wider : the layout of the batches before, or None: the addends it has are formed too, so
        the running totals keep one layout for the whole pass (:meth:`SlotSums.compact
        <scanner.engines.sums.SlotSums.compact>`); it only widens, when a later batch has a
        column that is not 0/1 or has a missing value.

    Attributes ``sq``, ``cnt``, ``joint`` (the arguments of
    :func:`scanner.engines.compiled.fold_rows`), ``w`` (addends per row), ``src`` and ``rep``
    (for each column of ``[n, Σx, Σx², ΣW]``, one sum of the totals' layout it holds: the
    columns of a matrix in that layout that make up one in this).
    """

    def __init__(self, Y: np.ndarray, pa: np.ndarray, pb: np.ndarray, known, wider=None):
        from . import compiled
        k, m = Y.shape
        # A column's sum is finite only when every value is (a huge sum that overflows merely
        # counts the column as incomplete, which is never wrong).
        full_col = np.isfinite(Y.sum(axis=1))
        binary = compiled.binary_columns(Y, np.asarray(known, np.bool_))
        self.sq = np.flatnonzero(~binary).astype(np.int64)
        self.cnt = np.flatnonzero(~full_col).astype(np.int64)
        # pairs with a missing value somewhere need their own joint count, sums and squares
        self.joint = ~(full_col[pa] & full_col[pb]) if pa.size else np.zeros(0, bool)
        if wider is not None:
            self.sq = np.union1d(self.sq, wider.sq).astype(np.int64)
            self.cnt = np.union1d(self.cnt, wider.cnt).astype(np.int64)
            self.joint = self.joint | wider.joint
        self.pa, self.pb = pa, pb
        self.w = k + self.sq.size + self.cnt.size + pa.size + 5 * int(self.joint.sum())
        self.src = _layout(k, self.sq, self.cnt, pa, pb, self.joint)
        # every column of [n, Σx, Σx², ΣW] holds one sum at least; its first one stands for it
        held, self.rep = np.unique(self.src, return_index=True)
        assert held.size == 3 + self.w

    def same(self, other) -> bool:
        """The same addends as ``other`` (a Layout or None)."""
        return (other is not None and np.array_equal(self.sq, other.sq)
                and np.array_equal(self.cnt, other.cnt) and np.array_equal(self.joint, other.joint))


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
