"""Wall time and peak memory of a scan, and the binning pass against simply reading the columns.

Usage::

    python benchmarks/bench_scan.py                 # 1M and 10M rows (the issue's sizes)
    python benchmarks/bench_scan.py --rows 200000   # a quick check

Table: 10 running variables, 3 treatments, 5 covariates, generated once into
``benchmarks/data/scan_<rows>/`` (git-ignored).  Each measurement runs in a fresh process so
its peak resident memory is its own: (1) reading the needed columns batch by batch with
pyarrow and nothing else, (2) the same read plus the conversion to float64 arrays the engine
needs, (3) the binning pass, (4) the full scan (binning, candidates, estimates, diagnostics).
Results go to ``benchmarks/results/scale.md``.
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_data as bd  # noqa: E402

SHAPE = (10, 3, 5)     # running variables, treatments, covariates


def measure(mode: str, folder: str, batch_rows: int, kernel: str = "sparse") -> dict:
    import numpy as np
    import scanner
    from scanner.engines import BinPlan, bin_table
    from scanner.io import open_table
    spec = bd.spec_for(Path(folder), *SHAPE, batch_rows=batch_rows)
    cols = ([r["column"] for r in spec["running"]] + spec["treatments"]["columns"]
            + spec["covariates"]["columns"])
    table = open_table(folder)
    if mode == "read":
        rows, secs, cpu = bd.timed(lambda: sum(b.num_rows for b in table.batches(cols, batch_rows)))
    elif mode == "read+convert":
        def run():
            n = 0
            for b in table.batches(cols, batch_rows):
                for c in b.columns:
                    c.to_numpy(zero_copy_only=False).astype(np.float64, copy=False)
                n += b.num_rows
            return n
        rows, secs, cpu = bd.timed(run)
    elif mode == "bin":
        plan = BinPlan(tuple(cols[:SHAPE[0]]), tuple(cols[SHAPE[0]:]),
                       tuple(spec["treatments"]["columns"]), batch_rows=batch_rows, kernel=kernel)
        res, secs, cpu = bd.timed(lambda: bin_table(table, plan))
        rows = res.rows_read
    else:
        res, secs, cpu = bd.timed(lambda: scanner.scan(spec))
        rows = res.data["rows_read"]
    return {"mode": mode, "rows": rows, "seconds": secs, "cpu_seconds": cpu,
            "peak_rss_mb": bd.peak_rss_mb()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=float, nargs="*", default=[1e6, 1e7])
    ap.add_argument("--batch-rows", type=int, default=1_000_000)
    ap.add_argument("--child", nargs="+")
    a = ap.parse_args()
    if a.child:
        print(json.dumps(measure(a.child[0], a.child[1], int(a.child[2]), *a.child[3:])))
        return
    lines = ["## Scan speed and memory (`benchmarks/bench_scan.py`)", "",
             f"Machine: {bd.machine()}. Table: {SHAPE[0]} running variables, {SHAPE[1]} "
             f"treatments, {SHAPE[2]} covariates, Parquet folder, batches of {a.batch_rows:,} rows.",
             "", "| rows | step | wall time (s) | CPU time (s) | peak RSS (MB) | wall vs read | CPU vs read |",
             "|---:|---|---:|---:|---:|---:|---:|"]
    for n in map(int, a.rows):
        folder = bd.generate(bd.DATA / f"scan_{n}", n, *SHAPE)
        bd.child(Path(__file__), "read", folder, a.batch_rows)      # warm the page cache
        got = {}
        for mode, extra in (("read", ()), ("read+convert", ()), ("bin", ()),
                            ("bin-bincount", ("bincount",)), ("scan", ())):
            r = bd.child(Path(__file__), mode.split("-")[0], folder, a.batch_rows, *extra)
            got[mode] = r
            print(f"{n:>11,} {mode:<13} {r['seconds']:8.2f} s {r['cpu_seconds']:8.2f} cpu-s "
                  f"{r['peak_rss_mb']:8.0f} MB", flush=True)
        base, cbase = got["read"]["seconds"], got["read"]["cpu_seconds"]
        label = {"bin": "binning pass (sparse product)", "bin-bincount": "binning pass (np.bincount)"}
        for mode, r in got.items():
            lines.append(f"| {n:,} | {label.get(mode, mode)} | {r['seconds']:.2f} | "
                         f"{r['cpu_seconds']:.2f} | {r['peak_rss_mb']:.0f} | "
                         f"{r['seconds'] / base:.1f}× | {r['cpu_seconds'] / cbase:.1f}× |")
    lines += ["", "Reproduce: `python benchmarks/bench_scan.py --rows " +
              " ".join(f"{int(n)}" for n in a.rows) + "`."]
    print(bd.write_section("bench_scan", "\n".join(lines)))


if __name__ == "__main__":
    main()
