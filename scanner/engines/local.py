"""Local engine: stream record batches and fold them into BinnedStats with numpy.

Bin grid: a running variable starts with exact-support bins.  As soon as the rows seen so far
hold more than ``plan.max_exact`` distinct values, the grid is settled from those rows — a
1-2-5 width of about 1/``target_bins`` of their central 98% range, origin 0 — the exact bins
accumulated so far are re-binned onto it (their sums stay exact), and every later batch goes
straight onto that grid.  The data are never re-read; peak memory is one batch plus the bins.
"""
from __future__ import annotations

import numpy as np

from ..bins import BinnedStats
from ..io import check_binary, numeric, period_codes
from .plan import BinPlan, BinResult, nice_width, weighted_quantile


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


def fold(running: str, key: np.ndarray, x: np.ndarray, period: np.ndarray, half: np.ndarray,
         cols: dict, pairs, template: BinnedStats) -> BinnedStats:
    """Group rows (already restricted to a finite running variable) into bins of ``template``'s kind."""
    if key.size == 0:
        return template
    ukey, kinv = np.unique(key, return_inverse=True)
    if (period >= 0).any() or (half >= 0).any():
        uper, pinv = np.unique(period, return_inverse=True)
        comp = (kinv.astype(np.int64) * len(uper) + pinv) * 3 + (half.astype(np.int64) + 1)
        ucomp, g = np.unique(comp, return_inverse=True)
        bkey = ukey[ucomp // 3 // len(uper)]
        bper = uper[(ucomp // 3) % len(uper)].astype(np.int32)
        bhalf = (ucomp % 3 - 1).astype(np.int8)
    else:
        g = kinv
        bkey = ukey
        bper = np.full(ukey.size, -1, np.int32)
        bhalf = np.full(ukey.size, -1, np.int8)
    nb = bkey.size
    n = np.bincount(g, minlength=nb).astype(np.int64)
    sx = np.bincount(g, weights=x, minlength=nb)
    sxx = np.bincount(g, weights=x * x, minlength=nb)
    k = len(template.columns)
    cnt = np.zeros((nb, k), np.int64)
    s1 = np.zeros((nb, k))
    s2 = np.zeros((nb, k))
    present = {}
    for j, name in enumerate(template.columns):
        v = cols[name]
        ok = np.isfinite(v)
        present[name] = ok
        if ok.all():
            gj, vj = g, v
        else:
            gj, vj = g[ok], v[ok]
        cnt[:, j] = np.bincount(gj, minlength=nb)
        s1[:, j] = np.bincount(gj, weights=vj, minlength=nb)
        s2[:, j] = np.bincount(gj, weights=vj * vj, minlength=nb)
    p = len(pairs)
    pf = {f: np.zeros((nb, p)) for f in ("pa", "pb", "paa", "pbb", "pab")}
    pn = np.zeros((nb, p), np.int64)
    for q, (a, b) in enumerate(pairs):
        ok = present[a] & present[b]
        ga, va, vb = g[ok], cols[a][ok], cols[b][ok]
        pn[:, q] = np.bincount(ga, minlength=nb)
        pf["pa"][:, q] = np.bincount(ga, weights=va, minlength=nb)
        pf["pb"][:, q] = np.bincount(ga, weights=vb, minlength=nb)
        pf["paa"][:, q] = np.bincount(ga, weights=va * va, minlength=nb)
        pf["pbb"][:, q] = np.bincount(ga, weights=vb * vb, minlength=nb)
        pf["pab"][:, q] = np.bincount(ga, weights=va * vb, minlength=nb)
    out = BinnedStats(running, template.columns, template.kind, template.width, template.origin,
                      bkey.astype(float), bper, bhalf, n, sx, sxx, cnt, s1, s2,
                      template.pairs, pn, **pf)
    return out


def settle_grid(stats: BinnedStats, target_bins: int) -> BinnedStats:
    """Choose a fixed-width grid from exact bins seen so far and re-bin them onto it."""
    lo, hi = weighted_quantile(stats.key, stats.n, [0.01, 0.99])
    span = hi - lo
    if not np.isfinite(span) or span <= 0:
        span = float(np.nanmax(stats.key) - np.nanmin(stats.key)) or 1.0
    return stats.to_width(nice_width(span, target_bins), origin=0.0)


def bin_local(table, plan: BinPlan, progress=None) -> BinResult:
    """One streaming pass over ``table`` (a :class:`scanner.io.Table`) with numpy."""
    acc = {}
    for r in plan.running:
        w = plan.bin_width.get(r)
        acc[r] = (BinnedStats.empty(r, plan.columns, plan.pairs, "width", float(w), 0.0)
                  if w else BinnedStats.empty(r, plan.columns, plan.pairs))
    missing = dict.fromkeys(plan.running, 0)
    nonfinite = dict.fromkeys(plan.running, 0)
    rows = 0
    for batch in table.batches(plan.needed):
        m = batch.num_rows
        if m == 0:
            continue
        cols = {c: numeric(batch, c, table.name, _role(c, plan)) for c in plan.columns}
        for t in plan.treatments:
            check_binary(cols[t], t, table.name)
        period = (period_codes(batch, plan.date, table.name) if plan.date
                  else np.full(m, -1, np.int32))
        if plan.split_seed is None:
            half = np.full(m, -1, np.int8)
        elif plan.split_unit:
            half = unit_halves(batch.column(plan.split_unit), plan.split_seed)
        else:
            half = half_split(np.arange(rows, rows + m), plan.split_seed)
        for r in plan.running:
            x = cols[r] if r in cols else numeric(batch, r, table.name, "running variable")
            isn = np.isnan(x)
            fin = np.isfinite(x)
            missing[r] += int(isn.sum())
            nonfinite[r] += int((~isn & ~fin).sum())
            xs = x[fin] if not fin.all() else x
            sub = {c: (v[fin] if not fin.all() else v) for c, v in cols.items()}
            st = acc[r]
            key = xs if st.kind == "exact" else np.floor((xs - st.origin) / st.width)
            part = fold(r, key, xs, period[fin], half[fin], sub, plan.pairs, st.restrict(np.zeros(st.n_bins, bool)))
            st = st.merge(part)
            if st.kind == "exact" and st.distinct_values() > plan.max_exact:
                st = settle_grid(st, plan.target_bins)
            acc[r] = st
        rows += m
        if progress:
            progress(m)
    return BinResult({r: s.validate() for r, s in acc.items()}, rows, missing, nonfinite)


def _role(column: str, plan: BinPlan) -> str:
    if column in plan.treatments:
        return "treatment"
    if column in plan.running:
        return "running variable"
    return "tracked"
