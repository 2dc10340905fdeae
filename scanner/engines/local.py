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
half) key so that the totals touched at one time stay in the processor's cache; split where
that key changes, the halves add to the running totals directly.  Group codes
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
from .accumulate import Accumulator, keyed
from .plan import BinPlan, BinResult
from .codes import _codes
from .batchfold import (as_is, check_treatment, fold_together, into, moved, quarters, release,
                        scratch)
from .resources import _kernel, _threads, block_rows, in_blocks, small_pages
from .compact import Layout
from .sums import unpack


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



def bin_local(table, plan: BinPlan, progress=None) -> BinResult:
    """One streaming pass over ``table`` (a :class:`scanner.io.Table`).

    With the compiled kernel the running variables of a batch are coded in two threads, each
    owning whole running variables, and the rows folded in two fixed halves (the loops release
    the GIL; :func:`scanner.engines.batchfold.fold_together`), so the totals do not depend on
    the number of threads; ``CUTSCAN_WORKERS=1`` keeps one.
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
    layout = None             # the addends formed, widened as batches need (compact.Layout)
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
            split = None if dest is None else _middle(by_detail[common][0])
            # Split there, no group of a variable keyed at least as finely as the rows' order
            # has rows on both sides: both threads add such variables' rows to their totals.
            direct = [split is not None and _FINER[d] >= _FINER[common] for d in details]
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
                wider = Layout(Y, pa, pb, [c in plan.treatments for c in plan.columns], layout)
                if not wider.same(layout):
                    for a in acc.values():
                        a.relayout(wider)
                layout = wider
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
                    x = as_is(batch, r, dest)
                    if x is None:
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
                    part = a.groups(codes, x, extra, groups[v], direct[v])
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
                              pool, kept, m // 2 if split is None else split)
                del Y
            rows += m
            if progress:
                progress(m)
        # Settling sorts and regroups every (bin, period, half) slot of a variable: with
        # period keys 10^5 of them for each continuous one, in fresh arrays (on ordinary
        # pages: small_pages).  One variable at a time: on the 10M-row dated table, settling
        # in both threads took more CPU (0.34-0.47 s against 0.21-0.23 s alone; in the pass
        # 4.5-6.1 s against 4.5-4.9 s for the whole of it, four runs each) for 0.07 s less
        # wall time at the median, the threads' first writes to fresh memory waiting on each
        # other.
        with small_pages():
            done = [a.finish().validate() for a in acc.values()]
    finally:
        if pool is not None:
            pool.shutdown()
        release()
    return BinResult(dict(zip(acc, done)), rows, missing, nonfinite)


_FINER = {"none": 0, "year": 1, "quarter": 2}     # period details, coarse to fine


def _middle(code: np.ndarray):
    """The boundary between codes nearest the middle of rows held in order of their code, or
    None where it leaves either side less than a quarter of the rows (a batch within one
    period and no halves)."""
    m = code.size
    c = code[m // 2]
    lo, hi = int(np.searchsorted(code, c, "left")), int(np.searchsorted(code, c, "right"))
    s = lo if m // 2 - lo <= hi - m // 2 else hi
    return s if min(s, m - s) >= m // 4 else None


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
