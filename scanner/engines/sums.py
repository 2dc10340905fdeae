"""Running per-bin sums that each batch is added to in place.

Adding a batch's BinnedStats to the totals used to mean concatenating both and re-sorting every
(bin, period, half) key — with period and half keys, hundreds of thousands of keys per running
variable and batch.  Here every (bin key, period, half) seen so far owns a slot (a row of one
float64 matrix); a batch's groups find their slots through a dense (bin, period-half) table
while it is small, by hashing after (:meth:`SlotSums.slots_grouped`), and are added with one
indexed ``+=`` (the compiled kernel adds its per-group sums the same way,
:func:`scanner.engines.compiled.scatter_add`).  Nothing is sorted until the totals are read (:meth:`SlotSums.stats`), so the cost
of a batch grows with the number of its groups, not with the totals, and memory with the
(bin, period, half) combinations that actually occur.  Counts are held as float64, exact up to
2^53 rows.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..bins import BinnedStats, _PAIR_FIELDS

_STRIDE = 3 * 2 ** 16          # period slots per bin: up to 65,536 periods × 3 half codes
TABLE_CELLS = 2 ** 22          # (bin, period-half) table of one running variable: at most 16 MB


def _matrix(st: BinnedStats) -> np.ndarray:
    """All sums of ``st`` as one float64 matrix, one row per bin."""
    k, p = len(st.columns), len(st.pairs)
    cols = [(st.n, 1), (st.sx, 1), (st.sxx, 1), (st.cnt, k), (st.s1, k), (st.s2, k)]
    cols += [(getattr(st, f), p) for f in _PAIR_FIELDS]
    return np.concatenate([np.asarray(c, float).reshape(st.n_bins, w) for c, w in cols], axis=1)


class SlotSums:
    """Totals of one running variable, one slot per (bin key, period, half)."""

    def __init__(self, template: BinnedStats):
        import pandas as pd
        self._pd = pd
        self.template = template.restrict(np.zeros(template.n_bins, bool))
        k, p = len(template.columns), len(template.pairs)
        self.width = 3 + 3 * k + 6 * p
        self.layout = None           # or a compact.Layout: see compact()
        self.size = 0
        self.M = np.zeros((0, self.width))
        # n, Σx and Σx² added row by row by the compiled pass, apart from M: 24 bytes a slot
        # where M's rows are 136 apart, so a batch's slots stay in the cache (the loop took
        # 0.4 s of CPU on the 10M-row dated table writing them into M).  Added to M's first
        # three columns, and zeroed, whenever M is read or rebuilt (flush()).
        self.nx = np.zeros((0, 3))
        self.key = np.zeros(0)
        self.period = np.zeros(0, np.int32)
        self.half = np.zeros(0, np.int8)
        self.code = np.zeros(0, np.int64)
        self.bin_keys = np.zeros(0)
        self._bins = pd.Index(self.bin_keys)
        self._periods: dict[int, int] = {}
        self._codes = None           # hashed codes, once the dense table would be too large
        self._lut = None
        self._cache = None

    @classmethod
    def of(cls, stats: BinnedStats) -> "SlotSums":
        s = cls(stats)
        s.add(stats)
        return s

    @property
    def n_keys(self) -> int:
        """Distinct bin keys (whatever their period and half keys)."""
        return self.bin_keys.size

    def _bin_index(self, key: np.ndarray) -> np.ndarray:
        idx = self._bins.get_indexer(key)
        new = idx < 0
        if new.any():
            self.bin_keys = np.concatenate([self.bin_keys, np.unique(key[new])])
            self._bins = self._pd.Index(self.bin_keys)
            idx = self._bins.get_indexer(key)
        return idx

    def _period_index(self, period: np.ndarray) -> np.ndarray:
        u, inv = np.unique(period, return_inverse=True)
        for v in u:
            self._periods.setdefault(int(v), len(self._periods))
        return np.array([self._periods[int(v)] for v in u], np.int64)[inv.ravel()]

    def _grow(self, need: int) -> None:
        if need <= self.M.shape[0]:
            return
        cap = max(need + need // 2, 2 * self.M.shape[0], 1024)
        # np.zeros leaves untouched pages to the system (zero until first written), where
        # concatenating would write every slot of the new matrix at once
        M = np.zeros((cap, self.width))
        M[:self.M.shape[0]] = self.M
        self.M = M
        nx = np.zeros((cap, 3))
        nx[:self.nx.shape[0]] = self.nx
        self.nx = nx
        for name, dtype in (("key", float), ("period", np.int32), ("half", np.int8),
                            ("code", np.int64)):
            old = getattr(self, name)
            new = np.zeros(cap, dtype)
            new[:old.size] = old
            setattr(self, name, new)

    def add(self, part: BinnedStats) -> None:
        """Add a batch's bins (each (key, period, half) at most once, as a fold returns them)."""
        self.add_raw(part.key, part.period, part.half, _matrix(part))

    def add_raw(self, key, period, half, M) -> None:
        """Add sums given as keys and one matrix in this module's layout (see :func:`_matrix`)."""
        if key.size == 0:
            return
        slot = self.slots(key, period, half)       # may grow self.M
        self.M[slot] += M if self.layout is None else M[:, self.layout.rep]

    def compact(self, layout) -> None:
        """Hold the totals as the columns ``[n, Σx, Σx², ΣW]`` of ``layout``
        (:class:`scanner.engines.compact.Layout`), the layout the compiled pass adds in, and
        give this module's layout only when they are read (:meth:`stats`).

        Every sum of this module's layout is one of those columns for the rows added so far
        (Σy² is Σy of a 0/1 column, and so on); the pass's layout only widens, so that stays
        true.  With the benchmark's 8 tracked columns the totals take 17 columns where this
        module's layout has 27, and the pass adds each batch's rows to them without moving
        them between layouts.
        """
        if layout.same(self.layout):
            return
        self.flush()
        cols = layout.rep if self.layout is None else self.layout.src[layout.rep]
        M = np.zeros((self.M.shape[0], cols.size))
        M[:self.size] = self.M[:self.size][:, cols]
        self.M, self.width, self.layout = M, cols.size, layout
        self._cache = None

    def slots(self, key, period, half) -> np.ndarray:
        """Slot (row of ``self.M``) of each distinct (key, period, half); new ones start at 0."""
        at = np.arange(np.size(key))
        return self.slots_grouped(key, at, period, half, at)

    def slots_grouped(self, ukey, b, eper, ehalf, e) -> np.ndarray:
        """:meth:`slots` of groups given as bin ``ukey[b]`` and period-half ``(eper, ehalf)[e]``
        (looks up each distinct bin and period once, not once per group)."""
        if b.size == 0:
            return np.zeros(0, np.int64)
        self._cache = None
        row = self._bin_index(ukey)[b]
        col = (self._period_index(eper) * 3 + (ehalf.astype(np.int64) + 1))[e]
        table = self._table()
        if table is not None:
            slot = table[row, col].astype(np.int64)
        else:
            slot = self._codes.get_indexer(row * _STRIDE + col)
        new = slot < 0
        if new.any():
            m = int(new.sum())
            self._grow(self.size + m)
            at = np.arange(self.size, self.size + m)
            slot[new] = at
            self.key[at] = ukey[b[new]]
            self.period[at], self.half[at] = eper[e[new]], ehalf[e[new]]
            self.code[at] = row[new] * _STRIDE + col[new]
            self.size += m
            if table is not None:
                table[row[new], col[new]] = at
            else:
                self._codes = self._pd.Index(self.code[:self.size])
        return slot

    def _table(self):
        """The dense (bin, period-half) → slot table, grown to the bins and periods seen so
        far; None once it would exceed ``TABLE_CELLS`` (look-ups then hash the combined codes).

        A batch of a continuous running variable with period keys has about 10^5 groups:
        hashing them, and re-hashing every slot whenever new ones appear, cost several
        milliseconds per batch."""
        if self._codes is not None:             # hashing already (the table never comes back)
            return None
        rows, cols = self.bin_keys.size, 3 * len(self._periods)
        if rows * cols > TABLE_CELLS:
            self._lut = None
            self._codes = self._pd.Index(self.code[:self.size])
            return None
        lut = self._lut
        if lut is None or lut.shape[0] < rows or lut.shape[1] < cols:
            grown = 2 * rows if 2 * rows * cols <= TABLE_CELLS else rows   # room for new bins
            lut = np.full((grown, cols), -1, np.int32)
            n = self.size
            lut[self.code[:n] // _STRIDE, self.code[:n] % _STRIDE] = np.arange(n)
            self._lut = lut
        return lut

    def touch(self) -> None:
        """Forget the cached :meth:`stats` (the slots were added to in place)."""
        self._cache = None

    def flush(self) -> None:
        """Move the sums held apart in ``nx`` into ``M``."""
        n = self.size
        if n and self.nx[:n].any():
            self.M[:n, :3] += self.nx[:n]
            self.nx[:n] = 0.0

    def stats(self) -> BinnedStats:
        """The totals as BinnedStats, bins sorted by (key, period, half)."""
        if self._cache is not None:
            return self._cache
        self.flush()
        n = self.size
        order = np.lexsort((self.half[:n], self.period[:n], self.key[:n]))
        # np.take: a third of the time of fancy indexing on 10^5 slots (rows, then columns)
        M = np.take(self.M[:n], order, axis=0)
        if self.layout is not None:
            M = np.take(M, self.layout.src, axis=1)
        self._cache = unpack(self.template, self.key[:n][order], self.period[:n][order],
                             self.half[:n][order], M)
        return self._cache


def unpack(template: BinnedStats, key, period, half, M) -> BinnedStats:
    """BinnedStats with the layout of ``template`` from keys and a matrix of sums (:func:`_matrix`)."""
    k, p = len(template.columns), len(template.pairs)
    cut = np.cumsum([1, 1, 1, k, k, k] + [p] * 6)[:-1]
    parts = np.split(M, cut, axis=1)

    def whole(a):                                            # counts, held as float64
        return np.rint(a).astype(np.int64)
    out = dict(n=whole(parts[0][:, 0]), sx=parts[1][:, 0], sxx=parts[2][:, 0],
               cnt=whole(parts[3]), s1=parts[4], s2=parts[5], pn=whole(parts[6]))
    for f, a in zip(_PAIR_FIELDS[1:], parts[7:]):
        out[f] = a
    return replace(template, key=np.asarray(key, float), period=np.asarray(period, np.int32),
                   half=np.asarray(half, np.int8), **out)
