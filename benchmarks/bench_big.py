"""A table that does not fit in memory: 100M dated rows scanned from a Parquet folder, peak RSS < 2 GB.

Usage::

    python benchmarks/bench_big.py                  # 100M rows (the issue's size, ~8 GB on disk)
    python benchmarks/bench_big.py --rows 5000000   # a quick check

Table: 10 running variables, 3 treatments, 5 covariates and a ten-year visit date (bench_data.py,
the shape of bench_scan.py), written once as a folder of 2M-row Parquet files under
``benchmarks/data/big_dated_<rows>/`` (git-ignored); the scan runs with defaults on and
``data.date`` set.  The scan runs in a
fresh process, so the peak resident memory reported is the scan's own; the in-memory size of the
needed columns as float64 is printed beside it for comparison.
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_data as bd  # noqa: E402

SHAPE = (10, 3, 5)
LIMIT_MB = 2048


def measure(folder: str, batch_rows: int) -> dict:
    import scanner
    spec = bd.spec_for(Path(folder), *SHAPE, batch_rows=batch_rows, dated=True)
    load = bd.load()
    res, wall, cpu = bd.timed(lambda: scanner.scan(spec))
    return {"rows": res.data["rows_read"], "seconds": wall, "cpu_seconds": cpu,
            "peak_rss_mb": bd.peak_rss_mb(), "child_peak_rss_mb": bd.child_peak_rss_mb(),
            "load": f"{load} at start, {bd.load()} at end", "candidates": len(res.rows),
            "bins": {k: v["n_bins"] for k, v in res.data["bins"].items()}}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=float, default=1e8)
    ap.add_argument("--batch-rows", type=int, default=1_000_000)
    ap.add_argument("--child", nargs=2)
    a = ap.parse_args()
    if a.child:
        print(json.dumps(measure(a.child[0], int(a.child[1]))))
        return
    n = int(a.rows)
    folder, gen_wall, _ = bd.timed(lambda: bd.generate(bd.DATA / f"big_dated_{n}", n, *SHAPE,
                                                       dated=True))
    disk = sum(p.stat().st_size for p in folder.glob("*.parquet")) / 2 ** 20
    r = bd.child(Path(__file__), folder, a.batch_rows)
    in_memory = n * sum(SHAPE) * 8 / 2 ** 20
    verdict = "under" if r["peak_rss_mb"] < LIMIT_MB else "OVER"
    lines = ["## Out-of-memory table (`benchmarks/bench_big.py`)", "",
             f"Machine: {bd.machine()}.",
             f"{r['rows']:,} rows × ({SHAPE[0]} running variables, {SHAPE[1]} treatments, "
             f"{SHAPE[2]} covariates, a ten-year visit date; defaults on) in a Parquet folder of "
             f"{disk:,.0f} MB "
             f"({in_memory:,.0f} MB as float64 in memory), batches of {a.batch_rows:,} rows.", "",
             "| wall time (s) | CPU time (s) | peak RSS (MB) | forked worker peak RSS (MB) | "
             "limit | candidates | load averages (1/5/15 min) |",
             "|---:|---:|---:|---:|---|---:|---|",
             f"| {r['seconds']:.1f} | {r['cpu_seconds']:.1f} | {r['peak_rss_mb']:.0f} | "
             f"{r['child_peak_rss_mb']:.0f} | {verdict} {LIMIT_MB} MB | {r['candidates']} | "
             f"{r['load']} |", "",
             "The forked worker that evaluates half of the running variables shares the main "
             "process's pages copy-on-write; its peak counts those shared pages again.", "",
             f"Bins per running variable: {r['bins']}. Generating the folder took "
             f"{gen_wall:.0f} s (not part of the scan).", "",
             f"Reproduce: `python benchmarks/bench_big.py --rows {n}`."]
    bd.publish("bench_big", lines)


if __name__ == "__main__":
    main()
