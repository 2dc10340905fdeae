"""Wall time and peak memory of a scan on a dated table, and the binning pass against a plain read.

Usage::

    python benchmarks/bench_scan.py                 # 1M and 10M rows (the issue's sizes)
    python benchmarks/bench_scan.py --rows 200000   # a quick check

Table: 10 running variables, 3 treatments, 5 covariates and a ten-year visit date (invented,
bench_data.py), generated once into ``benchmarks/data/scan_dated_<rows>/`` (git-ignored).  Each
measurement runs in a fresh process so its peak resident memory is its own:

- ``read``: the needed columns (running, tracked, date) batch by batch with pyarrow, nothing else;
- ``read+convert``: the 18 numeric columns read and turned into float64 the way the pass turns
  them (``scanner.io.numeric``) — the fair baseline of a pass without periods;
- ``read+convert dated``: the same plus the date turned into calendar quarters
  (``scanner.io.period_codes``) — the baseline of a pass that keeps periods;
- ``read+convert jemalloc``: ``read+convert`` with arrow's jemalloc pool, the pool the pass
  decodes its batches into (``scanner.engines.resources.reading_pool``) — shown to check that
  the baselines, read with pyarrow's default pool, are the faster way to read;
- ``bin plain``: the binning pass with no period and no half keys (its one-time start — importing
  numba and loading the compiled loops from the on-disk cache — is timed apart, on 5,000 rows,
  and shown in its own column: it does not grow with the rows);
- ``bin keys``: the pass as a dated scan runs it — year keys (the timeline) and the held-out half;
- ``bin quarters``: quarter and half keys on every running variable (what a dated rule asks for
  on its own variable), the largest detail the pass keeps;
- ``duckdb``: the same per-bin sums with year and half keys as one SQL GROUP BY per running
  variable in DuckDB (2 threads), on the grid our pass settled — the alternative route measured;
- ``scan`` / ``scan no date``: the full default scan (round numbers, discovery with the held-out
  half) with ``data.date`` set, and on the same table without it.

The machine is shared: every row records the load averages when it ran, and each step runs three
times (``--repeat``), its median run reported.  Results go to
``benchmarks/results/scale.md``.
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_data as bd  # noqa: E402

SHAPE = (10, 3, 5)     # running variables, treatments, covariates
MODES = ("read", "read+convert", "read+convert dated", "read+convert jemalloc", "bin plain",
         "bin keys", "bin quarters", "duckdb", "scan", "scan no date")
# The fair baseline of each pass: reading the columns it reads and converting them into the
# arrays it works on (float64 values; calendar quarters of the date where it keeps periods).
BASELINE = {"bin plain": "read+convert", "bin keys": "read+convert dated",
            "bin quarters": "read+convert dated", "scan": "read+convert dated",
            "scan no date": "read+convert"}


def _plan(spec, mode: str, batch_rows: int):
    from scanner.engines import BinPlan
    run = tuple(r["column"] for r in spec["running"])
    cols = tuple(spec["treatments"]["columns"] + spec["covariates"]["columns"])
    kw = {}
    if mode in ("bin keys", "bin quarters"):
        kw = dict(date="visit", split_seed=20240601,
                  periods={r: ("year" if mode == "bin keys" else "quarter") for r in run})
    return BinPlan(run, cols, tuple(spec["treatments"]["columns"]), batch_rows=batch_rows, **kw)


def _duckdb(folder: str, spec, grids: dict) -> int:
    """Per-bin sums with year and half keys, one GROUP BY per running variable."""
    import duckdb
    con = duckdb.connect()
    con.execute("SET threads = 2")
    src = f"read_parquet('{folder}/*.parquet')"
    cols = spec["treatments"]["columns"] + spec["covariates"]["columns"]
    sums = ", ".join(f"count({c}), sum({c}), sum({c}*{c})" for c in cols)
    rows = 0
    for r in (x["column"] for x in spec["running"]):
        width = grids[r]
        key = r if width is None else f"floor({r} / {width!r})"
        q = (f"SELECT {key} AS k, year(visit) * 4 AS period, hash(c1) & 1 AS half, count(*), "
             f"sum({r}), sum({r}*{r}), {sums} FROM {src} WHERE isfinite({r}) "
             "GROUP BY ALL")
        rows = max(rows, len(con.execute(q).fetchnumpy()["k"]))
    return rows


def measure(mode: str, folder: str, batch_rows: int, extra: str = "{}") -> dict:
    import numpy as np
    import scanner
    from scanner.engines import bin_table
    from scanner.io import open_table
    load = bd.load()
    spec = bd.spec_for(Path(folder), *SHAPE, batch_rows=batch_rows, dated=mode != "scan no date")
    cols = ([r["column"] for r in spec["running"]] + spec["treatments"]["columns"]
            + spec["covariates"]["columns"] + ["visit"])
    table = open_table(folder)
    info = {}
    if mode == "read":
        rows, secs, cpu = bd.timed(lambda: sum(b.num_rows for b in table.batches(cols, batch_rows)))
    elif mode.startswith("read+convert"):
        from scanner.io import numeric, period_codes
        dated = mode.endswith("dated")
        if mode.endswith("jemalloc"):
            import pyarrow as pa
            pa.set_memory_pool(pa.jemalloc_memory_pool())
        use = cols if dated else cols[:-1]

        def run():
            n = 0
            for b in table.batches(use, batch_rows):
                for c in use[:-1] if dated else use:
                    numeric(b, c, folder, "tracked")        # float64, as the pass converts them
                if dated:
                    period_codes(b, "visit", folder)
                n += b.num_rows
            return n
        rows, secs, cpu = bd.timed(run)
    elif mode.startswith("bin"):
        # One-time costs first, timed apart: importing numba and loading the compiled loops
        # from its on-disk cache, on the first 5,000 rows.  They do not grow with the rows, and
        # the baselines pay no such start either (pyarrow is imported above).
        head = next(table.batches(cols, 5000)).slice(0, 5000)
        _, warm, _ = bd.timed(lambda: bin_table(open_table(head), _plan(spec, mode, 5000)))
        res, secs, cpu = bd.timed(lambda: bin_table(table, _plan(spec, mode, batch_rows)))
        info["start_seconds"] = warm
        rows = res.rows_read
        info.update({"grids": {r: (None if st.kind == "exact" else st.width)
                               for r, st in res.stats.items()},
                     "bins": sum(st.n_bins for st in res.stats.values())})
    elif mode == "duckdb":
        groups, secs, cpu = bd.timed(lambda: _duckdb(folder, spec, json.loads(extra)))
        rows, info = None, {"largest_groups": groups}
    else:
        res, secs, cpu = bd.timed(lambda: scanner.scan(spec))
        rows = res.data["rows_read"]
        info = {"candidates": len(res.rows)}
    return {"mode": mode, "rows": rows, "seconds": secs, "cpu_seconds": cpu,
            "peak_rss_mb": bd.peak_rss_mb(), "child_peak_rss_mb": bd.child_peak_rss_mb(),
            "load": load, **info}


# The two ratios, each from runs of one round (a minute apart at most): the machine's
# speed drifts by up to half within an hour, so a ratio of two medians from different rounds
# can mislead.
PAIRS = (("bin keys", "bin plain", "cpu_seconds", "CPU of the keyed pass ÷ the plain pass"),
         ("bin plain", "read+convert", "seconds", "wall time of the plain pass ÷ read+convert"))


def _paired(runs: dict, n: int) -> list:
    import statistics
    out = []
    for top, bottom, field, what in PAIRS:
        if top in runs and bottom in runs:
            r = [a[field] / b[field] for a, b in zip(runs[top], runs[bottom])]
            out.append(f"| {n:,} | paired by round: {what} | "
                       + ", ".join(f"{x:.2f}×" for x in r)
                       + f" (median {statistics.median(r):.2f}×) |" + " |" * 11)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=float, nargs="*", default=[1e6, 1e7])
    ap.add_argument("--batch-rows", type=int, default=1_000_000)
    ap.add_argument("--modes", nargs="*", default=list(MODES))
    ap.add_argument("--repeat", type=int, default=3,
                    help="runs per mode (fresh processes); the median wall time is reported")
    ap.add_argument("--irregular", action="store_true",
                    help="the irregular table: every second running variable skewed, on a "
                         "half-integer lattice (both with 999 missing codes, declared in the "
                         "scans' spec; the bare passes bin 999 as a value) or coarse float32")
    ap.add_argument("--child", nargs="+")
    a = ap.parse_args()
    if a.child:
        print(json.dumps(measure(a.child[0], a.child[1], int(a.child[2]), *a.child[3:])))
        return
    shape = ("; every second running variable skewed or on a half-integer lattice (both with "
             "999 missing codes, declared in the scans' spec; the bare passes bin 999 as a "
             "value) or coarse float32" if a.irregular else "")
    lines = ["## Scan speed and memory (`benchmarks/bench_scan.py" +
             (" --irregular" if a.irregular else "") + "`)", "",
             f"Machine: {bd.machine()}. Table: {SHAPE[0]} running variables{shape}, {SHAPE[1]} "
             f"treatments, {SHAPE[2]} covariates and a ten-year visit date, Parquet folder, "
             f"batches of {a.batch_rows:,} rows. Wall time on this shared 2-core machine moves "
             "with the load of other jobs (last column: 1/5/15-minute load averages when the "
             "step ran); CPU time (this process and its forked worker) moves less.",
             f"Each step ran {a.repeat} times in fresh processes, in rounds over the steps; its "
             "row is the run with the median wall time, with the range of the runs beside it.",
             "", "| rows | step | wall (s) | wall range (s) | CPU (s) | peak RSS (MB) | wall vs read | "
             "CPU vs read | baseline (same columns read and converted) | wall vs baseline | "
             "CPU vs baseline | CPU vs plain pass | one-time start (s) | load |",
             "|---:|---|---:|---:|---:|---:|---:|---:|---|---:|---:|---:|---:|---|"]
    for n in map(int, a.rows):
        name = "scan_irregular" if a.irregular else "scan_dated"
        folder = bd.generate(bd.DATA / f"{name}_{n}", n, *SHAPE, dated=True,
                             irregular=a.irregular)
        bd.child(Path(__file__), "read", folder, a.batch_rows)      # warm the page cache
        runs, grids = {m: [] for m in a.modes}, "{}"
        # Rounds over all modes, so a burst of other jobs' load spreads over the modes; each
        # mode's row is its run with the median wall time (the range is shown beside it).
        for _ in range(a.repeat):
            for mode in a.modes:
                r = bd.child(Path(__file__), mode, folder, a.batch_rows, grids)
                if mode == "bin plain":
                    grids = json.dumps(r["grids"])
                runs[mode].append(r)
                print(f"{n:>11,} {mode:<13} {r['seconds']:8.2f} s {r['cpu_seconds']:8.2f} cpu-s "
                      f"{r['peak_rss_mb']:8.0f} MB load {r['load']}", flush=True)
        got = {}
        for mode, rs in runs.items():
            rs = sorted(rs, key=lambda r: r["seconds"])
            got[mode] = dict(rs[(len(rs) - 1) // 2],
                             range=f"{rs[0]['seconds']:.2f}–{rs[-1]['seconds']:.2f}")
        base = got.get("read", {}).get("seconds", float("nan"))
        cbase = got.get("read", {}).get("cpu_seconds", float("nan"))
        plain = got.get("bin plain", {}).get("cpu_seconds", float("nan"))
        for mode, r in got.items():
            peak = f"{r['peak_rss_mb']:.0f}"
            if r.get("child_peak_rss_mb", 0) > 1:
                peak += f" (+ worker {r['child_peak_rss_mb']:.0f})"
            b = got.get(BASELINE.get(mode, ""), {})
            rel = (f"{BASELINE[mode]} | {r['seconds'] / b['seconds']:.1f}× | "
                   f"{r['cpu_seconds'] / b['cpu_seconds']:.1f}×" if b else "— | — | —")
            start = f"{r['start_seconds']:.2f}" if "start_seconds" in r else "—"
            vs_read = (f"{r['seconds'] / base:.1f}× | {r['cpu_seconds'] / cbase:.1f}×"
                       if base == base else "— | —")        # no "read" step in this round
            lines.append(f"| {n:,} | {mode} | {r['seconds']:.2f} | {r['range']} | "
                         f"{r['cpu_seconds']:.2f} | "
                         f"{peak} | {vs_read} | "
                         f"{rel} | {r['cpu_seconds'] / plain:.2f}× | {start} | {r['load']} |")
        lines += _paired(runs, n)
    lines += ["", "Peak RSS of a scan is the main process; the forked worker that evaluates half "
              "of the running variables shares its pages copy-on-write, so the two do not add up.",
              "", "Reproduce: `python benchmarks/bench_scan.py" +
              (" --irregular" if a.irregular else "") + " --rows " +
              " ".join(f"{int(n)}" for n in a.rows) +
              ("" if a.repeat == 3 else f" --repeat {a.repeat}") +
              ("" if list(a.modes) == list(MODES) else
               " --modes " + " ".join(f'"{m}"' if " " in m else m for m in a.modes)) + "`."]
    print(bd.write_section("bench_scan_irregular" if a.irregular else "bench_scan",
                           "\n".join(lines)))


if __name__ == "__main__":
    main()
