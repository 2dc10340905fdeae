"""Would a compiled (numba) kernel earn its place in the binning pass?  A measurement, not a feature.

Usage::

    python benchmarks/bench_numba_pass.py     # 1M rows, the bench_scan table

For every batch of the bench_scan table (10 running variables, 3 treatments, 5 covariates) the
pieces of the local engine's pass are timed separately: turning the batch into float64 arrays,
the addend matrix (``engines.local.Columns``), the group codes of all running variables, and the
per-bin sums (``np.bincount`` for n, Σx, Σx² plus the sparse one-hot product for the tracked
columns).  The sums are then done by one fused numba loop over the rows that updates the bins of
all ten running variables at once — the only part a compiled scatter-add replaces — and checked
to give the same sums.  numba's import and first-call compile time are measured in the same run,
since a scan in a fresh process pays them.  Results go to ``benchmarks/results/scale.md``.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_data as bd  # noqa: E402

SHAPE = (10, 3, 5)


def best(fn, repeat=3):
    out, secs = None, []
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        secs.append(time.perf_counter() - t)
    return out, min(secs)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=float, default=1e6)
    a = ap.parse_args()
    from scanner.engines import BinPlan
    from scanner.engines.local import Accumulator, Columns, _segment_sums
    from scanner.io import numeric, open_table
    t0 = time.perf_counter()
    import numba
    t_import = time.perf_counter() - t0

    @numba.njit(nogil=True)
    def fused(codes, nbs, x, mat):
        # codes, x: (variables, rows); per variable a (bins + 1) × (3 + columns) table of
        # n, Σx, Σx² and the column sums (the last bin collects rows without a bin).
        R, m = codes.shape
        k = mat.shape[1]
        outs = [np.zeros((nbs[r] + 1, 3 + k)) for r in range(R)]
        for i in range(m):
            row = mat[i]
            for r in range(R):
                o, g, xi = outs[r], codes[r, i], x[r, i]
                o[g, 0] += 1.0
                o[g, 1] += xi
                o[g, 2] += xi * xi
                for j in range(k):
                    o[g, 3 + j] += row[j]
        return outs

    t0 = time.perf_counter()
    fused(np.zeros((1, 2), np.int64), np.array([1]), np.zeros((1, 2)), np.zeros((2, 1)))
    t_compile = time.perf_counter() - t0

    n = int(a.rows)
    folder = bd.generate(bd.DATA / f"scan_{n}", n, *SHAPE)
    spec = bd.spec_for(folder, *SHAPE)
    run = [r["column"] for r in spec["running"]]
    treat = spec["treatments"]["columns"]
    tracked = treat + spec["covariates"]["columns"]
    plan = BinPlan(tuple(run), tuple(tracked), tuple(treat))
    acc = {r: Accumulator(r, plan) for r in run}
    table = open_table(str(folder))
    tot = dict.fromkeys(("read", "convert", "matrix", "codes", "sums numpy", "sums numba"), 0.0)
    worst, rows = 0.0, 0
    t_read = time.perf_counter()
    batches = list(table.batches(run + tracked, 1_000_000))
    tot["read"] = time.perf_counter() - t_read
    for batch in batches:
        rows += batch.num_rows
        (cols, xs), tot_c = best(lambda: ({c: numeric(batch, c, "t", "tracked") for c in tracked},
                                          {r: numeric(batch, r, "t", "running variable") for r in run}))
        packed, t_m = best(lambda: Columns(cols, tracked, (), set(treat)))
        oks = {r: np.isfinite(xs[r]) for r in run}
        t1 = time.perf_counter()
        codes = {r: acc[r].codes(xs[r], oks[r]) for r in run}   # once: it moves the grid state
        tot["codes"] += time.perf_counter() - t1
        x0 = {r: np.where(oks[r], xs[r], 0.0) for r in run}

        def numpy_sums():
            out = {}
            for r in run:
                g, _, nb = codes[r]
                out[r] = (np.bincount(g, minlength=nb + 1)[:nb],
                          np.bincount(g, weights=x0[r], minlength=nb + 1)[:nb],
                          np.bincount(g, weights=x0[r] * x0[r], minlength=nb + 1)[:nb],
                          _segment_sums(g, nb, packed.mat, "sparse"))
            return out
        C = np.stack([codes[r][0] for r in run])
        X = np.stack([x0[r] for r in run])
        nbs = np.array([codes[r][2] for r in run])
        ref, t_np = best(numpy_sums)
        got, t_nb = best(lambda: fused(C, nbs, X, packed.mat))
        for i, r in enumerate(run):
            if not np.array_equal(got[i][:-1, 0], ref[r][0]):
                raise RuntimeError(f"counts differ for {r}")
            scale = max(1.0, float(np.abs(ref[r][3]).max()))
            worst = max(worst, float(np.abs(got[i][:-1, 3:] - ref[r][3]).max()) / scale)
        tot["convert"] += tot_c
        tot["matrix"] += t_m
        tot["sums numpy"] += t_np
        tot["sums numba"] += t_nb
    saved = tot["sums numpy"] - tot["sums numba"]
    numpy_pass = tot["convert"] + tot["matrix"] + tot["codes"] + tot["sums numpy"]
    lines = ["## A compiled kernel for the binning pass? (`benchmarks/bench_numba_pass.py`)", "",
             f"Machine: {bd.machine()}. {rows:,} rows of the bench_scan table, batches as read, "
             f"numba {numba.__version__}; wall seconds, best of 3 per batch.", "",
             "| piece of the pass | seconds |", "|---|---:|",
             f"| read the columns (pyarrow) | {tot['read']:.3f} |",
             f"| convert to float64 | {tot['convert']:.3f} |",
             f"| addend matrix (`Columns`) | {tot['matrix']:.3f} |",
             f"| group codes, 10 running variables | {tot['codes']:.3f} |",
             f"| per-bin sums, numpy (bincount + sparse product) | {tot['sums numpy']:.3f} |",
             f"| per-bin sums, one fused numba loop | {tot['sums numba']:.3f} |",
             f"| numba import + first-call compile (once per process) | {t_import + t_compile:.3f} |",
             "", f"The fused loop gives the same sums (largest relative difference {worst:.1e}) "
             f"and saves {saved:.3f} s of a {numpy_pass:.3f} s numpy pass "
             f"({100 * saved / numpy_pass:.0f}%), "
             f"{'less' if saved < t_import + t_compile else 'more'} than the "
             f"{t_import + t_compile:.2f} s a fresh process spends importing and compiling it. "
             f"Group codes and the addend matrix, which it does not replace, take "
             f"{tot['codes'] + tot['matrix']:.3f} s.", "",
             "This is the measurement that came before the compiled kernel: it times the numpy "
             "kernels (now the fallback where numba cannot be imported) against a loop that "
             "replaces only their per-bin sums.  The compiled pass that replaced the whole fold "
             "(codes, groups and sums) is measured by `bench_scan.py` above.", "",
             f"Reproduce: `python benchmarks/bench_numba_pass.py --rows {n}`."]
    bd.publish("bench_numba", lines)


if __name__ == "__main__":
    main()
