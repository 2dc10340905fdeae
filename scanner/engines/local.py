"""Local engine: stream record batches and fold them into BinnedStats with numpy/scipy.

Streaming.  The table is read batch by batch (``plan.batch_rows`` rows at most; Parquet files
and folders, CSV and Feather through ``pyarrow.dataset``, reading only the columns the plan
needs, one batch of read-ahead).  Each batch is folded into per-bin sums and added to the
running totals, then dropped, so peak memory is a few batches plus at most ``plan.fine_keys``
bins per running variable (times the period and half keys present) — never the table.

Bin grid, without re-reading the data.  Our "first look" is the exact support itself: while a
running variable has at most ``plan.fine_keys`` distinct values its bins are exact (lossless);
past that, rows go onto a power-of-ten grid that is made ten times coarser whenever it holds
more than ``plan.fine_keys`` bins (regrouping keys is exact).  At the end a variable with at
most ``plan.max_exact`` distinct values keeps exact bins, and any other gets the finest 1-2-5
width with at most ``plan.max_bins`` occupied bins (:mod:`scanner.engines.grid`), kept as fine
as the pass's own bins next to declared cutoffs (:mod:`scanner.engines.settle`).  We chose this
over a sample of the first rows or Parquet min/max statistics because the result depends only
on the set of values: a table sorted by the running variable, a stray outlier, a different
batch size or a Spark partitioning cannot change the grid.  An outlier costs one bin.

Speed.  The default kernel (``plan.kernel = "compiled"``, :mod:`scanner.engines.compiled`) codes
each running variable's rows in compiled loops (the running variables of a batch in two
threads; the loops release the GIL), then adds every row's sums to all running variables'
groups in one pass per half of the batch, after moving the rows to the order of their (period,
half) key so that the totals touched at one time stay in the processor's cache.  Group codes
of exact values and grid keys come from dense integer offsets, with hash factorisation where
keys are too spread out.  The numpy kernels are kept for checking and for machines without
numba: one sparse one-hot product per running variable (``"sparse"``, scipy) or one
``np.bincount`` per sum (``"bincount"``); all three give the same sums to 1e-9 (tested).
numba's import and the loading of the cached machine code cost about a second per process,
which the pass earns back from about a million rows.
The cost of the pass against plain reading is in ``benchmarks/results/scale.md``.
"""
from __future__ import annotations

import numpy as np

from ..bins import BinnedStats
from ..io import check_binary, numeric, period_codes, prefetched
from . import grid
from .plan import BinPlan, BinResult
from .codes import _codes, _codes_compiled
from .batchfold import check_treatment, fold_together, into, moved, quarters, release, scratch
from .resources import _kernel, _threads, block_rows, in_blocks
from .compact import Layout
from .settle import base_index as _base, regroup, settle
from .sums import SlotSums, unpack


def half_split(index: np.ndarray, seed: int) -> np.ndarray:
    """Seeded pseudo-random 0/1 per row position (splitmix64 finaliser)."""
    with np.errstate(over="ignore"):
        z = index.astype(np.uint64) + np.uint64(seed) * np.uint64(0x9E3779B97F4A7C15)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        z = z ^ (z >> np.uint64(31))
    return (z & np.uint64(1)).astype(np.int8)


def unit_halves(values, seed: int) -> np.ndarray:
    """Seeded 0/1 per row from a hash of its unit id (independent of row order and batching).

    Ids are compared as text, so 17 and "17" fall in the same half; missing ids hash as one value.
    """
    import pandas as pd
    import pyarrow as pa
    import pyarrow.compute as pc
    text = pc.cast(values, pa.string()).fill_null("").to_numpy(zero_copy_only=False)
    return half_split(pd.util.hash_array(text.astype(object), categorize=False), seed)


# ---------------------------------------------------------------------- per-batch columns
class Columns:
    """The tracked columns of one batch laid out as one matrix of per-row addends.

    ``layout`` maps a BinnedStats field to (column of ``mat`` or None, fallback) so that the
    per-bin sums of every field are columns of ``G @ mat`` for the one-hot bin matrix ``G``.
    """

    def __init__(self, cols: dict, names, pairs, binary):
        m = len(next(iter(cols.values()))) if cols else 0
        parts, self.index = [], {}

        def add(tag, v):
            self.index[tag] = len(parts)
            parts.append(v)
        present, zero = {}, {}
        for name in names:
            v = cols[name]
            ok = np.isfinite(v)
            full = bool(ok.all())
            present[name] = None if full else ok.astype(np.float64)
            z = v if full else np.where(ok, v, 0.0)
            zero[name] = z
            add(("s1", name), z)
            if name not in binary:          # a 0/1 column's Σy² is its Σy
                add(("s2", name), z * z)
            if not full:
                add(("cnt", name), present[name])
        for a, b in pairs:
            pa_, pb_ = present[a], present[b]
            za, zb = zero[a], zero[b]
            add(("pab", a, b), za * zb)
            if pa_ is None and pb_ is None:
                continue
            both = (pa_ if pa_ is not None else 1.0) * (pb_ if pb_ is not None else 1.0)
            add(("pn", a, b), np.broadcast_to(both, (m,)).astype(np.float64))
            add(("pa", a, b), za * (pb_ if pb_ is not None else 1.0))
            add(("pb", a, b), zb * (pa_ if pa_ is not None else 1.0))
            add(("paa", a, b), za * za * (pb_ if pb_ is not None else 1.0))
            add(("pbb", a, b), zb * zb * (pa_ if pa_ is not None else 1.0))
        self.mat = np.column_stack(parts) if parts else np.zeros((m, 0))
        self.names, self.pairs, self.binary = tuple(names), tuple(pairs), set(binary)

    def gather(self, template: BinnedStats) -> np.ndarray:
        """Column of ``[per-bin sums of mat | row count]`` for each sum after (n, Σx, Σx²) in
        the layout of :mod:`scanner.engines.sums`; -1 is the row count."""
        idx = self.index
        s1 = [idx[("s1", c)] for c in template.columns]
        s2 = [idx.get(("s2", c), idx[("s1", c)]) for c in template.columns]   # 0/1: Σy² = Σy
        cnt = [idx.get(("cnt", c), -1) for c in template.columns]
        out = cnt + s1 + s2
        pairs = {f: [] for f in ("pn", "pa", "pb", "paa", "pbb", "pab")}
        for a, b in template.pairs:
            ja, jb = template.col(a), template.col(b)
            pairs["pab"].append(idx[("pab", a, b)])
            if ("pn", a, b) in idx:
                for f in ("pn", "pa", "pb", "paa", "pbb"):
                    pairs[f].append(idx[(f, a, b)])
            else:
                pairs["pn"].append(-1)
                pairs["pa"].append(s1[ja])
                pairs["pb"].append(s1[jb])
                pairs["paa"].append(s2[ja])
                pairs["pbb"].append(s2[jb])
        for f in ("pn", "pa", "pb", "paa", "pbb", "pab"):
            out += pairs[f]
        return np.array(out, np.int64)


def _segment_sums(g: np.ndarray, nb: int, mat: np.ndarray, kernel: str) -> np.ndarray:
    """Column sums of ``mat`` per group ``g`` (0..nb-1); rows with g == nb are dropped."""
    if mat.shape[1] == 0:
        return np.zeros((nb, 0))
    if kernel == "bincount":
        return np.column_stack([np.bincount(g, weights=mat[:, j], minlength=nb + 1)[:nb]
                                for j in range(mat.shape[1])])
    import scipy.sparse as sp
    m = g.size
    one_hot = sp.csc_matrix((np.ones(m), g, np.arange(m + 1)), shape=(nb + 1, m))
    return np.asarray(one_hot @ mat)[:nb]


def keyed(period: np.ndarray, half: np.ndarray):
    """One small integer per row for its (period, half) keys: (code, number of codes, first period).

    Periods are counted from the batch's first one (0 = missing), so composite codes with the
    bin stay a dense range and need no hashing.
    """
    period = period.astype(np.int64)
    dated = period >= 0
    p0 = int(period[dated].min()) if dated.any() else 0
    ext = np.where(dated, period - p0 + 1, 0) * 3 + (half.astype(np.int64) + 1)
    return ext, int(ext.max()) + 1, p0


def fold_raw(codes, x: np.ndarray, ok: np.ndarray, extra, batch: Columns, template: BinnedStats,
             kernel: str = "sparse"):
    """Per-bin sums of one batch for rows with ``ok`` (finite running variable).

    ``codes`` is ``_codes(key, ok, ...)`` with at least one group; ``extra`` is None, (period,
    half) per row, or :func:`keyed` of them; ``template`` gives the layout.  Returns (key, period, half, M)
    with the sums as one matrix in the layout of :mod:`scanner.engines.sums`.
    """
    g, ukey, nb = codes
    if extra is None:
        bkey = ukey.astype(float)
        bper = np.full(nb, -1, np.int32)
        bhalf = np.full(nb, -1, np.int8)
    else:
        ext, span, p0 = extra if len(extra) == 3 else keyed(*extra)
        comp = np.where(g < nb, g * span + ext, -1)
        g, ucomp, nb = _codes(comp, g < nb, True)
        bkey = ukey[ucomp // span].astype(float)
        r = (ucomp % span) // 3
        bper = np.where(r > 0, r - 1 + p0, -1).astype(np.int32)
        bhalf = ((ucomp % span) % 3 - 1).astype(np.int8)
    xs = np.where(ok, x, 0.0)
    gather = batch.gather(template)
    M = np.empty((nb, 3 + gather.size))
    M[:, 0] = np.bincount(g, minlength=nb + 1)[:nb]
    M[:, 1] = np.bincount(g, weights=xs, minlength=nb + 1)[:nb]
    M[:, 2] = np.bincount(g, weights=xs * xs, minlength=nb + 1)[:nb]
    S = _segment_sums(g, nb, batch.mat, kernel)
    # every other sum is a column of S, or the row count (index -1 of [S | n])
    M[:, 3:] = np.concatenate([S, M[:, :1]], axis=1)[:, gather]
    return bkey, bper, bhalf, M


def fold(running: str, codes, x: np.ndarray, ok: np.ndarray, extra, batch: Columns,
         template: BinnedStats, kernel: str = "sparse") -> BinnedStats:
    """:func:`fold_raw` as a BinnedStats."""
    g, ukey, nb = codes
    if nb == 0:
        return template
    return unpack(template, *fold_raw(codes, x, ok, extra, batch, template, kernel))


# ---------------------------------------------------------------------- grid state
class Accumulator:
    """Running totals for one running variable and the state of its grid."""

    def __init__(self, running: str, plan: BinPlan):
        self.plan = plan
        w = plan.bin_width.get(running)
        self.forced = tuple(sorted(set((float(v), bool(rc)) for v, rc in plan.edges.get(running, ()))))
        if w:
            self.state, self.grid = "user", grid.grid_of_width(float(w))
            self.stats = BinnedStats.empty(running, plan.columns, plan.pairs, "width",
                                           grid.width_of(*self.grid), 0.0, self.forced)
        else:
            self.state, self.grid = "exact", None
            self.stats = BinnedStats.empty(running, plan.columns, plan.pairs)
        self.level = None
        self.decimals = 0
        self.buffer = None        # where the compiled kernel writes this batch's group codes
        self._mx = None           # its groups' n, Σx and Σx² (compiled kernel), reused
        self._lut = self._first = None    # compiled.local_groups's buffers, reused

    @property
    def stats(self) -> BinnedStats:
        return self.sums.stats()

    @stats.setter
    def stats(self, value: BinnedStats) -> None:
        self.sums = SlotSums.of(value)

    @property
    def template(self) -> BinnedStats:
        """An empty BinnedStats with the current layout (kind, grid, forced edges)."""
        return self.sums.template

    def key(self, x: np.ndarray, ok: np.ndarray):
        """Row keys for the current state, whether they are integers (dense codes), and the
        number of parts per bin (keys are ``k*parts + j`` for part j of grid bin k)."""
        if self.state == "exact":
            return x, False, 1
        if _kernel(self.plan.kernel) == "compiled":
            k = grid.keys_compiled(x, ok, *self.grid, out=scratch(x.size, np.int64))
        else:
            k = np.where(ok, grid.keys(np.where(ok, x, 0.0), *self.grid), 0)
        inn = grid.inner(self.forced, *self.grid, self.template.running)
        j = grid.sub_index(k, np.where(ok, x, 0.0), inn) if inn[0].size else None
        if j is None:
            return k, True, 1
        parts = int(j.max()) + 1
        return k * parts + j, True, parts

    def codes(self, x: np.ndarray, ok: np.ndarray):
        """Group codes of a batch's rows, leaving exact bins first if the batch would overflow.

        Checked before folding, so a batch of continuous values never becomes a batch-sized
        set of exact bins.
        """
        f = self.plan.fine_keys
        out, parts, tried = None, 1, False
        if self.state == "exact" and _kernel(self.plan.kernel) == "compiled":
            # Short decimals (most registry values) are coded in two compiled passes; only
            # other values need the look at the batch's head below.
            out, self.decimals = _codes_compiled(x, ok, False, self.decimals, fallback=False,
                                                 out=self.buffer)
            tried = True
        if out is None:
            if self.state == "exact" and x.size > 8 * f:
                # The first 8·fine_keys rows as the pass holds them (in period-half order when
                # rows are moved) may hold more than fine_keys values: then it leaves exact bins
                # without grouping a batch's worth of distinct floats first.  Any such set of
                # values certifies the same settled level (see _leave_exact).
                head = np.unique(x[:8 * f][ok[:8 * f]])
                if head.size > f:
                    self._leave_exact(np.union1d(head, self.sums.bin_keys))
            key, dense, parts = self.key(x, ok)
            # Still exact, with short decimals ruled out already: hash the values directly.
            out = (_codes(key, ok, False, decimals=False) if tried and self.state == "exact"
                   else self._codes(key, ok, dense))
        if self.state == "exact" and out[2] + self.sums.n_keys > f:
            vals = np.union1d(out[1], self.sums.bin_keys)
            if vals.size > f:
                self._leave_exact(vals)
                key, dense, parts = self.key(x, ok)
                out = self._codes(key, ok, dense)
        if parts > 1:       # part j of grid bin k has key k + j/SUB
            g, u, nb = out
            out = (g, np.floor_divide(u, parts) + np.mod(u, parts) / grid.SUB, nb)
        if self.state == "fine" and out[2] > f and self._coarsen(_base(np.asarray(out[1]))):
            # The batch alone held more grid bins than the pass keeps: the grid is coarsened
            # now, as add() would do right after folding it, and the batch is coded again at
            # the level it ends at (a skewed lab value's first batch had 3·10^5 groups with
            # year keys, its later ones 5·10^4: the fold's matrices are sized by the first).
            return self.codes(x, ok)
        return out

    def _leave_exact(self, vals: np.ndarray) -> None:
        """Go from exact bins to the power-of-ten grid, given more than fine_keys of the
        table's values.  Any such set certifies a start level no coarser than the settled one
        (grid.start_level), and coarsening during the pass ends at the same level whichever
        set it was, so a spread subset of them is enough."""
        f = self.plan.fine_keys
        if vals.size > 4 * f:
            vals = vals[np.linspace(0, vals.size - 1, 4 * f).astype(np.int64)]
        self.level = grid.start_level(vals, f)
        self.grid = grid.power_grid(self.level)
        # Exact keys are the raw values, so keying them is keying the rows.
        self.stats = regroup(self.stats, grid.keys(self.stats.key, *self.grid), *self.grid,
                             self.forced)
        self.state = "fine"

    def _codes(self, key, ok, dense):
        if _kernel(self.plan.kernel) != "compiled":
            return _codes(key, ok, dense)
        out, self.decimals = _codes_compiled(key, ok, dense, self.decimals, out=self.buffer)
        return out

    def add(self, raw) -> None:
        """Add one batch's sums (:func:`fold_raw`); coarsen the power-of-ten grid while it
        holds too many bins."""
        if raw is not None:
            self.sums.add_raw(*raw)
        self._coarsen()

    def _coarsen(self, batch=None) -> bool:
        """Coarsen the power-of-ten grid while the bins held (and the grid bins ``batch`` of a
        batch about to be folded) are more than ``fine_keys``; True if it was coarsened."""
        f = self.plan.fine_keys
        if self.state != "fine" or (batch is None and self.sums.n_keys <= f):
            return False
        keys = np.unique(_base(self.sums.bin_keys))
        if batch is not None:
            keys = np.union1d(keys, batch)
        coarsened = False
        # Whole grid bins are counted, not the parts a declared cutoff splits one into (as the
        # Spark engine counts them): declaring a cutoff must not coarsen the grid.
        while keys.size > f:
            self.level += 1
            self.grid = grid.power_grid(self.level)
            self.stats = regroup(self.stats, np.floor_divide(_base(self.stats.key), 10),
                                 *self.grid, self.forced)
            keys = np.unique(np.floor_divide(keys, 10))
            coarsened = True
        return coarsened

    def groups(self, codes, x: np.ndarray, extra, out: np.ndarray):
        """A batch's groups for the compiled kernel (:mod:`.compiled`), or None with no finite
        running value: (group per row — skipped unless 0 <= group < G —, G, the groups' n,
        Σx and Σx² (G × 3), the slot of each group in the running totals).

        ``codes`` as from :meth:`codes`; ``extra`` None or :func:`keyed` keys; the groups are
        written to ``out`` (int32, which may hold the codes already).  The other sums
        come from :func:`scanner.engines.compiled.fold_rows`, for every running variable at
        once; :meth:`add_groups` adds them.
        """
        from . import compiled
        g, ukey, nb = codes
        if not nb:
            return None
        if extra is None:
            ext, span, p0 = _NO_EXT, 1, 0
        else:
            ext, span, p0 = extra if len(extra) == 3 else keyed(*extra)
        if span == 1:       # no period or half keys: the dense codes are the groups
            group, first = out, np.arange(nb, dtype=np.int64)
            if not np.may_share_memory(g, out):
                out[:] = g
        elif nb * span <= LUT_MAX:
            lut, first = self._local_buffers(nb * span, min(x.size, nb * span))
            group, first = compiled.local_groups(g, nb, ext, span, out, lut, first)
        else:       # too many combinations for a dense table: hash them
            import pandas as pd
            live = g < nb
            comp = g[live].astype(np.int64) * span + (ext[live] if ext.size else 0)
            codes_, first = pd.factorize(comp)
            group = out
            group[:] = -1
            group[live] = codes_
        b, e = np.divmod(np.asarray(first, np.int64), span)
        r = np.arange(span) // 3
        slot = self.sums.slots_grouped(np.asarray(ukey, float), b,
                                       np.where(r > 0, r - 1 + p0, -1).astype(np.int32),
                                       (np.arange(span) % 3 - 1).astype(np.int8), e)
        if self._mx is None or self._mx.shape[0] < b.size:
            self._mx = np.empty((b.size * 5 // 4, 3))     # kept: room for the next batches
        Mx = self._mx[:b.size]
        Mx[:] = 0.0
        compiled.add_n_x(group, x, Mx)
        return group, b.size, Mx, np.asarray(slot, np.int64)

    def _local_buffers(self, cells: int, groups: int):
        """:func:`compiled.local_groups`'s look-up table (all -1) and group list: kept between
        batches up to ``KEEP_CELLS`` cells (fresh ones cost page faults on every batch), made
        for the call above that."""
        if cells > KEEP_CELLS:
            return np.full(cells, -1, np.int32), np.empty(groups, np.int64)
        if self._lut is None or self._lut.size < cells:
            self._lut = np.full(min(cells * 5 // 4, KEEP_CELLS), -1, np.int32)  # room for more bins
        if self._first is None or self._first.size < groups:
            self._first = np.empty(min(groups * 5 // 4, KEEP_CELLS), np.int64)
        return self._lut, self._first

    def add_groups(self, slot: np.ndarray, Mc: np.ndarray, src: np.ndarray) -> None:
        """Add a batch's per-group sums ``Mc`` ([n, Σx, Σx², addends]; ``src`` maps the totals'
        layout onto its columns) to the totals' ``slot`` rows."""
        from . import compiled
        compiled.scatter_add(self.sums.M, slot, Mc, src)
        self.sums.touch()
        self.add(None)

    def finish(self) -> BinnedStats:
        """The settled bins (:func:`scanner.engines.settle.settle`)."""
        return settle(self.stats, self.state, self.level, self.forced, self.plan)


_NO_EXT = np.zeros(0, np.int64)
LUT_MAX = 1 << 22         # dense (bin, period-half) look-up table of one batch: at most 16 MB
KEEP_CELLS = 1 << 20      # such tables up to 4 MB (and their group lists) are kept between batches


def bin_local(table, plan: BinPlan, progress=None) -> BinResult:
    """One streaming pass over ``table`` (a :class:`scanner.io.Table`).

    With the compiled kernel the running variables of a batch are folded in two threads (the
    loops release the GIL; each thread owns whole running variables, so the totals do not
    depend on the split); ``CUTSCAN_WORKERS=1`` keeps one.
    """
    acc = {r: Accumulator(r, plan) for r in plan.running}
    missing = dict.fromkeys(plan.running, 0)
    nonfinite = dict.fromkeys(plan.running, 0)
    kernel = _kernel(plan.kernel)
    pool = None
    if kernel == "compiled" and len(plan.running) > 1 and _threads() > 1:
        from concurrent.futures import ThreadPoolExecutor
        pool = ThreadPoolExecutor(_threads())
    rows = 0
    ybuf = gbuf = None
    kept = [None] * 4         # the fold's two matrices and seen flags, reused (batchfold.fold_together)
    try:
        blocks = block_rows(plan) if kernel == "compiled" else None
        for batch in in_blocks(prefetched(table.batches(plan.needed, plan.batch_rows)), blocks):
            m = batch.num_rows
            if m == 0:
                continue
            dated = plan.date in plan.needed if plan.date else False
            quarter = None
            if dated:
                quarter = (quarters(batch, plan.date, table.name) if kernel == "compiled"
                           else period_codes(batch, plan.date, table.name))
            half = None
            if plan.split_seed is not None:
                if plan.split_unit:
                    half = unit_halves(batch.column(plan.split_unit), plan.split_seed)
                elif kernel == "compiled":
                    from . import compiled
                    half = compiled.row_halves(rows, m, plan.split_seed)
                else:
                    half = half_split(np.arange(rows, rows + m), plan.split_seed)
            details = [plan.period_of(r) for r in plan.running]
            by_detail = {d: _extra(d, quarter, half, m, kernel == "compiled")
                         for d in set(details)}
            common = max(details, key=details.count)     # a tie: the first in plan order
            dest = None
            if kernel == "compiled" and by_detail[common] is not None:
                # Rows are folded in order of their (period, half) code: see
                # compiled.sorted_positions.  Each column is moved there as it is converted,
                # so values are read and messages quote them in file order.
                from . import compiled
                dest = compiled.sorted_positions(*by_detail[common][:2])
                by_detail = {d: None if e is None else (moved(e[0], dest),) + e[1:]
                             for d, e in by_detail.items()}
            k = len(plan.columns)
            Y = None
            if kernel == "compiled":
                if ybuf is None or ybuf.size < k * m:
                    ybuf = np.empty(k * m)
                Y = ybuf[:k * m].reshape(k, m)

            def convert(j):
                # pyarrow's casts and the compiled copies release the GIL: columns convert in
                # parallel
                name = plan.columns[j]
                if Y is None:
                    return numeric(batch, name, table.name, _role(name, plan))
                into(batch, name, table.name, _role(name, plan), Y[j], dest)
                return Y[j]
            cols = dict(zip(plan.columns, pool.map(convert, range(k)) if pool
                            else map(convert, range(k))))
            for t in plan.treatments:
                (check_binary if Y is None else check_treatment)(cols[t], t, table.name)
            if kernel == "compiled":
                from . import compiled
                pos = {c: j for j, c in enumerate(plan.columns)}
                pa = np.array([pos[a] for a, _ in plan.pairs], np.int64)
                pb = np.array([pos[b] for _, b in plan.pairs], np.int64)
                layout = Layout(Y, pa, pb, [c in plan.treatments for c in plan.columns])
                if gbuf is None or gbuf.shape[1] < m:
                    gbuf = np.empty((len(plan.running), m), np.int32)
                groups = gbuf[:, :m]
            else:
                packed = Columns(cols, plan.columns, plan.pairs, plan.treatments)

            def one(v):
                r = plan.running[v]
                extra = by_detail[plan.period_of(r)]
                if r in cols:
                    x = cols[r]
                elif kernel == "compiled":
                    x = into(batch, r, table.name, "running variable", scratch(m), dest)
                else:
                    x = numeric(batch, r, table.name, "running variable")
                if kernel == "compiled":
                    ok, nan, inf = compiled.finite_counts(x)
                else:
                    ok, nan = np.isfinite(x), int(np.isnan(x).sum())
                    inf = int(m - ok.sum() - nan)
                a = acc[r]
                if kernel == "compiled":
                    a.buffer = groups[v]
                codes = a.codes(x, ok)
                part = None
                if kernel == "compiled":
                    part = a.groups(codes, x, extra, groups[v])
                    if part is None:
                        groups[v] = -1
                else:
                    a.add(fold_raw(codes, x, ok, extra, packed, a.template, kernel)
                          if codes[2] else None)
                return nan, inf, part
            V = range(len(plan.running))
            got = list(pool.map(one, V)) if pool else [one(v) for v in V]
            for r, (nan, inf, _) in zip(plan.running, got):
                missing[r] += nan
                nonfinite[r] += inf
            if kernel == "compiled":
                fold_together(acc, plan.running, [p for _, _, p in got], groups, Y, layout,
                               pool, kept)
                del Y
            rows += m
            if progress:
                progress(m)
        # Settling sorts and regroups every (bin, period, half) slot of a variable: with
        # period keys 10^5 of them for each continuous one.  Variables settle independently
        # (numpy's sorts and gathers release the GIL), so both threads share the work.
        done = list((pool.map if pool else map)(lambda a: a.finish().validate(), acc.values()))
    finally:
        if pool is not None:
            pool.shutdown()
        release()
    return BinResult(dict(zip(acc, done)), rows, missing, nonfinite)


def _extra(detail: str, quarter, half, m: int, fast: bool = False):
    """(period, half) keys of a batch's rows for one running variable, or None for neither
    (:func:`keyed` of them; with ``fast``, the same through one compiled loop)."""
    if (detail == "none" or quarter is None) and half is None:
        return None
    if fast:
        from . import compiled
        none = np.zeros(0, np.int32)
        return compiled.period_keys(none if detail == "none" or quarter is None else quarter,
                                    detail == "year", none.astype(np.int8) if half is None
                                    else half)
    if detail == "none" or quarter is None:
        return keyed(np.full(m, -1, np.int32), half)
    period = quarter if detail == "quarter" else np.where(quarter >= 0, quarter // 4 * 4, -1)
    return keyed(period, np.full(m, -1, np.int8) if half is None else half)


def _role(column: str, plan: BinPlan) -> str:
    if column in plan.treatments:
        return "treatment"
    if column in plan.running:
        return "running variable"
    return "tracked"


def exact_bins(running: str, x, cols: dict, pairs=(), period=None, half=None) -> BinnedStats:
    """Exact-support BinnedStats of rows already in memory (simulations and tests).

    The same fold as the streaming pass, one bin per distinct finite value of ``x``; ``cols``
    maps tracked column names to row arrays, ``period``/``half`` are optional per-row keys.
    """
    x = np.asarray(x, float)
    ok = np.isfinite(x)
    names = tuple(cols)
    template = BinnedStats.empty(running, names, tuple(pairs))
    packed = Columns({k: np.asarray(v, float) for k, v in cols.items()}, names, tuple(pairs), ())
    extra = None
    if period is not None or half is not None:
        m = x.size
        extra = (np.full(m, -1, np.int32) if period is None else np.asarray(period, np.int32),
                 np.full(m, -1, np.int8) if half is None else np.asarray(half, np.int8))
    # merge() re-groups and sorts the bins by key, as the streaming pass leaves them.
    return template.merge(fold(running, _codes(x, ok, False), x, ok, extra, packed, template)).validate()
