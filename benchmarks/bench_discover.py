"""Speed of the discovery scan for one running variable × treatment.

10,000 exact-support bins (about 10 rows each, invented data), 500 grid points, default
settings: grid fits, multiplier simulation of the sup-|t| null (1,000 draws) and peaks.
Target (issue 5): under a second.  Timings depend on the machine's load; the median of
``--repeat`` runs is reported.

Run: ``env PYTHONPATH=. python benchmarks/bench_discover.py``
"""
from __future__ import annotations

import argparse
import os
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")   # a 500 × 500 factorisation: threads only contend
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np

from scanner.bins import BinnedStats
from scanner.breaks import search_pair
from scanner.discover import null_sup, scan_grid


def make_bins(B=10_000, seed=0):
    rng = np.random.default_rng(seed)
    x = np.sort(rng.uniform(0, 100, B))
    n = rng.poisson(10, B) + 1
    s1 = rng.binomial(n, 0.2 + 0.003 * x + 0.15 * (x >= 61.3)).astype(float)
    return BinnedStats("score", ("uptake",), "exact", np.nan, np.nan, x, np.full(B, -1, np.int32),
                       np.full(B, -1, np.int8), n.astype(np.int64), n * x, n * x * x,
                       n[:, None].astype(np.int64), s1[:, None], s1[:, None]).validate()


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=5)
    a = ap.parse_args()
    st = make_bins()
    times, parts, cpu = [], [], []
    for r in range(a.repeat):
        c0 = time.process_time()
        t0 = time.perf_counter()
        sc = scan_grid(st, "uptake")
        t1 = time.perf_counter()
        null = null_sup(sc, seed=r)
        t2 = time.perf_counter()
        peaks = search_pair(st, "uptake", seed=r).peaks      # the whole sequential search
        t3 = time.perf_counter()
        times.append(t3 - t0)
        cpu.append(time.process_time() - c0)
        parts.append((t1 - t0, t2 - t1, t3 - t2))
    med = float(np.median(times))
    cmed = float(np.median(cpu))
    fit, sim, pk = np.median(np.array(parts), axis=0)
    load = os.getloadavg()[0]
    print(f"bins {st.n_bins}, grid points {sc.grid.size} (valid {int(sc.valid.sum())}), "
          f"h = {sc.bandwidth:.3g}")
    print(f"discovery scan: median {med:.3f} s wall ({cmed:.3f} s CPU) over {a.repeat} runs "
          f"(grid fits {fit:.3f} s, null simulation {sim:.3f} s, peaks {pk:.4f} s); "
          f"load average {load:.1f}; peak at {peaks[0].location:.2f}" if peaks else "no peak")
    from benchmarks.discover_report import save
    md = f"""## Speed

`env PYTHONPATH=. python benchmarks/bench_discover.py` — one running variable × treatment,
{st.n_bins:,} bins, {sc.grid.size} grid points: median **{med:.3f} s** wall, {cmed:.3f} s CPU,
over {a.repeat} runs (grid fits {fit:.3f} s, null simulation {sim:.3f} s), load average {load:.1f}
on the 2-core machine (other jobs running); target < 1 s.
"""
    save("speed", {"seconds_median": med, "cpu_seconds_median": cmed, "fit": fit, "simulation": sim, "bins": st.n_bins,
                   "grid_points": int(sc.grid.size), "load": load}, md)


if __name__ == "__main__":
    main()
