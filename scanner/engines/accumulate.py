"""Per running variable state of the local pass: its running totals and its bin grid.

:class:`Accumulator` holds one running variable's totals (:class:`scanner.engines.sums.SlotSums`)
and the state of its grid (exact values, the power-of-ten grid while the pass runs, or a width
the user set), codes each batch's rows into groups, and settles the bins at the end
(:mod:`scanner.engines.settle`).  The engine that streams the table is
:mod:`scanner.engines.local`.
"""
from __future__ import annotations

import numpy as np

from ..bins import BinnedStats
from . import grid
from .batchfold import scratch
from .codes import _codes, _codes_compiled
from .plan import BinPlan
from .resources import _kernel
from .settle import base_index as _base, regroup, settle
from .sums import SlotSums


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


# ---------------------------------------------------------------------- grid state
class Accumulator:
    """Running totals for one running variable and the state of its grid."""

    def __init__(self, running: str, plan: BinPlan):
        self.plan = plan
        self.layout = None        # the compiled pass's layout of the totals (relayout)
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
        if self.layout is not None:
            self.sums.compact(self.layout)

    def relayout(self, layout) -> None:
        """Hold the totals in the compiled pass's layout of addends from now on
        (:meth:`SlotSums.compact <scanner.engines.sums.SlotSums.compact>`)."""
        self.layout = layout
        self.sums.compact(layout)

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

    def groups(self, codes, x: np.ndarray, extra, out: np.ndarray, direct: bool = False):
        """A batch's groups for the compiled kernel (:mod:`.compiled`), or None with no finite
        running value: (group per row — skipped unless 0 <= group < G —, G, the groups' n,
        Σx and Σx² (G × 3), the slot of each group in the running totals).

        ``codes`` as from :meth:`codes`; ``extra`` None or :func:`keyed` keys; the groups are
        written to ``out`` (int32, which may hold the codes already).  The other sums
        come from :func:`scanner.engines.compiled.fold_rows`, for every running variable at
        once (:func:`scanner.engines.batchfold.fold_together`).

        With ``direct`` each row's group is replaced by its slot (-1: no finite running value)
        and n, Σx and Σx² go straight to the totals (the place of the groups' matrix is None):
        with period keys a continuous running variable has 10^5 groups a batch, and adding
        them to the totals afterwards cost a fifth of what the pass spent over its cost
        without keys.
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
        G = b.size
        r = np.arange(span) // 3
        slot = self.sums.slots_grouped(np.asarray(ukey, float), b,
                                       np.where(r > 0, r - 1 + p0, -1).astype(np.int32),
                                       (np.arange(span) % 3 - 1).astype(np.int8), e)
        slot = np.asarray(slot, np.int64)
        if direct:
            compiled.to_slots(group, slot, x, self.sums.nx)
            return group, G, None, slot
        if self._mx is None or self._mx.shape[0] < G:
            self._mx = np.empty((G * 5 // 4, 3))     # kept: room for the next batches
        Mx = self._mx[:G]
        Mx[:] = 0.0
        compiled.add_n_x(group, x, Mx)
        return group, G, Mx, slot

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

    def finish(self) -> BinnedStats:
        """The settled bins (:func:`scanner.engines.settle.settle`)."""
        return settle(self.stats, self.state, self.level, self.forced, self.plan)


_NO_EXT = np.zeros(0, np.int64)
LUT_MAX = 1 << 22         # dense (bin, period-half) look-up table of one batch: at most 16 MB
KEEP_CELLS = 1 << 20      # such tables up to 4 MB (and their group lists) are kept between batches

