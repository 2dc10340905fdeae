"""The end of the binning pass: the final grid, split where the bins held during the pass allow.

Every engine ends its pass in the same state — exact bins, or bins of one power-of-ten grid
split at the forced edges (:mod:`scanner.engines.grid`) — and hands it to :func:`settle`, so
the local, Spark and database paths settle identically.

Final grid.  A variable with at most ``plan.max_exact`` distinct values keeps exact bins; any
other gets the finest 1-2-5 width with at most ``plan.max_bins`` occupied bins, split at the
forced edges (declared cutoffs) and, with ``plan.round_edges``, at the round values the
candidate rule can propose.

Pass resolution near declared cutoffs.  One width for the whole range is too coarse where the
rows are dense and the range is long: for a skewed score (lognormal, a long right tail) the
settled width can leave two bins between zero and a cutoff, and a local fit there rests on bin
means instead of rows.  The bins held at the end of the pass are finer (up to
``plan.fine_keys`` of them), and every one of their edges can split the final grid exactly.
Our rule: on each side of each declared cutoff, the ``REFINE_BINS`` occupied final bins
nearest it are split at the edges of the pass's bins inside them — the power-of-ten grid's
edges, or every distinct value when the variable stayed exact-support during the pass — at
most ``REFINE_EDGES`` edges per side (the nearest to the cutoff first), ``PART_ROOM`` per
final bin (a bin has at most ``grid.SUB`` parts), and ``plan.max_bins`` (at least one cutoff's
2 × ``REFINE_EDGES``) for all cutoffs of the variable together.  A bandwidth spanning fewer than
``REFINE_BINS`` final bins — the case where fixed-width bins are coarse for the fit — then
works from bins as fine as the pass kept; a wider one has at least ``REFINE_BINS`` bins a side
anyway.  The rule reads only the set of occupied bins, never row order, batch size or engine.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..bins import BinnedStats
from . import grid

REFINE_BINS = 10      # our choice: occupied final bins a side of a declared cutoff kept at pass resolution
REFINE_EDGES = 400    # our choice: at most this many added edges per side of a cutoff, nearest first
PART_ROOM = 512       # our choice: at most this many added edges inside one final bin (of grid.SUB)


def base_index(key: np.ndarray) -> np.ndarray:
    """Grid bin index of fixed-width keys (dropping the part of a split bin)."""
    return np.floor(key).astype(np.int64)


def regroup(stats: BinnedStats, key: np.ndarray, p: float, d: int, forced=()) -> BinnedStats:
    """``stats`` with bins re-keyed by grid bin ``key`` on the grid (p, d); sums add up exactly.

    Bins of the new grid that hold a forced edge are split there.  Each source bin lies wholly
    on one side of every forced edge (an exact value, or a bin already split at it or ending on
    it), so its midpoint tells the side.
    """
    forced = tuple(sorted(set(forced)))
    base = replace(stats, kind="width", width=grid.width_of(p, d), origin=0.0, edges=forced)
    key = np.asarray(key, np.int64)
    lo, hi = stats.bounds()
    j = grid.sub_index(key, (lo + hi) / 2, grid.inner(forced, p, d, stats.running))
    fkey = key.astype(float) if j is None else key + j / grid.SUB
    return base._grouped(fkey, stats.period, stats.half, stats._arrays())


def splittable(stats: BinnedStats, value: float) -> bool:
    """True when no bin of ``stats`` holds rows on both sides of ``value`` (it can become an edge)."""
    if stats.kind == "exact":
        return True
    lo, hi = stats.bounds()
    return not ((lo < value) & (value < hi)).any()


def pass_edges(st: BinnedStats, level: int | None) -> np.ndarray:
    """Right-closed edges of the bins held at the end of the pass (sorted, distinct).

    Exact bins: every occupied value (``x >= v`` opens a part holding v alone).  Power-of-ten
    bins (``level``): both grid edges of every occupied bin; the forced edges that already
    split them stay as they are.
    """
    occ = np.unique(st.key[st.n > 0])
    if level is None:
        return occ
    b = np.unique(base_index(occ)).astype(float)
    p, d = grid.power_grid(level)
    return np.unique(np.concatenate([grid.edges(b, p, d), grid.edges(b + 1, p, d)]))


def near_edges(st: BinnedStats, level: int | None, final_key: np.ndarray, g, cutoffs,
               budget: int | None = None) -> set:
    """Edges of the pass's bins to add to the final grid ``g`` around each declared cutoff.

    ``final_key`` is the final-grid bin of every bin of ``st``; ``cutoffs`` the forced edges
    ``(value, right_closed)`` known before the pass; ``budget`` caps the edges added for all
    cutoffs together (the nearest to a cutoff kept), so a catalogue with many cutoffs on one
    variable cannot multiply its bins.  Returns pairs ``(value, True)`` (see the module
    docstring for the rule).
    """
    cuts = sorted({float(c) for c, _ in cutoffs})
    if not cuts or st.n_bins == 0:
        return set()
    occupied = np.unique(np.asarray(final_key, np.int64)[st.n > 0]).astype(float)
    if occupied.size == 0:
        return set()
    cand = pass_edges(st, level)
    start, stop = grid.edges(occupied, *g), grid.edges(occupied + 1, *g)
    picked = []
    for c in cuts:
        left = np.flatnonzero(start < c)[-REFINE_BINS:]       # final bins reaching below c
        right = np.flatnonzero(stop > c)[:REFINE_BINS]        # final bins reaching above c
        lo = start[left[0]] if left.size else c
        hi = stop[right[-1]] if right.size else c
        below = cand[(cand > lo) & (cand < c)][-REFINE_EDGES:]
        above = cand[(cand > c) & (cand < hi)][:REFINE_EDGES]
        picked.append(np.concatenate([below, cand[cand == c], above]))
    v = np.unique(np.concatenate(picked))
    if v.size == 0:
        return set()
    # Room for parts: within one final bin keep the PART_ROOM edges nearest a cutoff.
    cut = np.asarray(cuts)
    pos = np.clip(np.searchsorted(cut, v), 1, cut.size) - 1
    dist = np.minimum(np.abs(v - cut[pos]), np.abs(v - cut[np.minimum(pos + 1, cut.size - 1)]))
    k = grid.keys(v, *g)
    order = np.lexsort((v, dist, k))
    ks = k[order]
    rank = np.arange(ks.size) - np.searchsorted(ks, ks, "left")
    keep = order[rank < PART_ROOM]
    if budget is not None and keep.size > budget:
        keep = keep[np.argsort(dist[keep], kind="stable")[:budget]]
    return {(float(x), True) for x in v[np.sort(keep)]}


def settle(st: BinnedStats, state: str, level: int | None, forced, plan) -> BinnedStats:
    """The final bins of one running variable from the state the pass ended in.

    ``state`` is "user" (a user-set width: kept as it is), "exact" or "fine" (bins of the
    10^``level`` grid); ``forced`` the declared cutoffs as forced edges.  Every engine calls
    this with the same state, so all produce the same bins.
    """
    if state == "user" or st.n_bins == 0:
        return st
    if state == "exact":
        if st.distinct_values() <= plan.max_exact:
            return st
        m, e = grid.final_grid(np.unique(st.key), None, plan.max_bins)
        g = grid.series_grid(m, e)
        return _split(st, grid.keys(st.key, *g), g, None, forced, plan)
    m, e = grid.final_grid(np.unique(base_index(st.key)), level, plan.max_bins)
    r = m * 10 ** (e - level)
    return _split(st, np.floor_divide(base_index(st.key), r), grid.series_grid(m, e), level,
                  forced, plan)


def _split(st: BinnedStats, key, g, level, forced, plan) -> BinnedStats:
    """The final grid ``g`` split at the forced edges, at the pass's edges near the declared
    cutoffs, and (``plan.round_edges``) at every round value
    :func:`scanner.candidates.round_cutoffs` can propose on it, where the bins held so far
    allow that exactly.  Splitting moves bin means, which can move the round values, so the
    last step repeats until they settle."""
    budget = max(plan.max_bins, 2 * REFINE_EDGES)      # one cutoff always gets its refinement
    forced = set(forced) | near_edges(st, level, key, g, forced, budget)
    out = regroup(st, key, *g, forced)
    if not plan.round_edges:
        return out
    from ..candidates import round_cutoffs
    for _ in range(5):
        new = {(v, True) for v in round_cutoffs(out, 0)} - forced
        new = {e for e in new if splittable(st, e[0])}
        if not new:
            break
        forced |= new
        out = regroup(st, key, *g, forced)
    return out
