"""Long-format registry benchmark: measurements and events → a registry-wide screen.

Data (invented, scanner.events.demo_long): 1M persons, about 10.6M measurements of 20 kinds and
10.0M events of 50 codes, with enrolment periods; planted jumps for HbA1c → metformin, eGFR →
renal referral, everything else noise.  Two timings, each in a fresh interpreter (own peak RSS),
with DuckDB building the analysis rows:

* the registry-wide screen (``[screen]``: 20 measurement kinds × 50 event codes = 1,000 pairs,
  window 0–180 days, defaults otherwise: round numbers and discovery with the held-out half),
  scan and results.json;
* one pair (HbA1c × metformin within 180 days, 365-day look-back), scan and results.json.

Usage: python benchmarks/bench_events.py [--persons 1000000]
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from benchmarks.bench_data import (DATA, child, child_peak_rss_mb, machine, peak_rss_mb,  # noqa: E402
                                   publish)
from scanner.events.demo_long import DATA_TABLES, EVENTS_TABLE  # noqa: E402

SCREEN = """\
title = "events benchmark: registry-wide screen"
""" + DATA_TABLES + EVENTS_TABLE + """[screen]
min_persons = 1000
min_event_persons = 1000
days = [0, 180]
[covariates]
columns = ["female"]
"""

PAIR = """\
title = "events benchmark: one pair"
""" + DATA_TABLES + """[[running]]
name = "hba1c"
column = "value"
where = { test = "HBA1C" }
""" + EVENTS_TABLE + """[[events.uptake]]
name = "metformin_180d"
codes = ["NM-MTF"]
days = [0, 180]
prior_days = 365
[covariates]
columns = ["female"]
"""


def data(persons: int) -> Path:
    from scanner.events.demo_long import write_long
    folder = DATA / f"events_{persons}"
    if not (folder / "_complete").exists():
        # About 0.37 planted events per person; the noise makes up 10 events per person.
        write_long(folder, n_persons=persons, extra_tests=17, extra_codes=47, visits=1.0,
                   noise_events=10 * persons - 37 * persons // 100)
        (folder / "_complete").write_text("ok\n")
    return folder


def _cpu() -> float:
    import resource
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def _phases() -> dict:
    """Wrap the scan's steps to add up their wall and CPU time (``--phases``)."""
    import functools
    import importlib
    import scanner.events.duck as duck
    import scanner.events.screen as screen
    scan_mod = importlib.import_module("scanner.scan")
    took: dict = {}

    def wrap(owner, name, label):
        f = getattr(owner, name)

        @functools.wraps(f)
        def timed(*a, **k):
            t, c = time.perf_counter(), _cpu()
            try:
                return f(*a, **k)
            finally:
                w0, c0 = took.get(label, (0.0, 0.0))
                took[label] = (w0 + time.perf_counter() - t, c0 + _cpu() - c)
        setattr(owner, name, timed)
    for owner, name, label in ((screen, "expand", "kinds and codes"),
                               (scan_mod, "open_for_scan", "analysis rows"),
                               (duck.Registry, "bin", "bins in DuckDB"),
                               (screen, "first_stage", "stage 1"),
                               (scan_mod, "evaluate_all", "stage 2"),
                               (scan_mod, "discovery_step", "discovery")):
        wrap(owner, name, label)
    return took


def run_child(folder: str, which: str, phases: bool = False) -> None:
    import scanner
    took = _phases() if phases else {}
    spec = Path(folder) / f"bench_{which}.toml"
    spec.write_text(SCREEN if which == "screen" else PAIR)
    load0 = os.getloadavg()[0]
    t0, c0 = time.perf_counter(), _cpu()
    res = scanner.scan(spec)
    res.to_json(Path(folder) / f"bench_{which}.json")
    wall, cpu = time.perf_counter() - t0, _cpu() - c0
    s = res.search.get("screen") or {}
    # CPU time: this process (DuckDB's threads included) and the forked stage-1 and candidate
    # workers; peak RSS of this process and of the largest worker (which shares its pages).
    print(json.dumps({"wall": wall, "cpu": cpu, "load": [load0, os.getloadavg()[0]],
                      "peak_mb": peak_rss_mb(), "child_mb": child_peak_rss_mb(),
                      "phases": took, "candidates": len(res.rows),
                      "pairs": len(s.get("pairs", [])) or 1,
                      "stage1": sum(p["tested"] for p in s.get("pairs", [])),
                      "index_rows": sum(x["rows"] for x in res.data.get("index_rows", []))}))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--persons", type=int, default=1_000_000)
    ap.add_argument("--child", nargs=2)
    ap.add_argument("--phases", action="store_true",
                    help="time the screen's steps (wall and CPU of this process and its workers)")
    a = ap.parse_args()
    if a.child:
        return run_child(*a.child, phases=a.phases)
    folder = data(a.persons)
    import pyarrow.parquet as pq
    n_m = pq.ParquetFile(folder / "lab_results.parquet").metadata.num_rows
    n_e = pq.ParquetFile(folder / "dispensing.parquet").metadata.num_rows
    lines = [f"## Long-format registry ({a.persons:,} persons, {n_m:,} measurements, {n_e:,} events)",
             "", f"Machine: {machine()}.", "",
             "| run | pairs | stage-1 tests | index rows | candidates | wall (s) | CPU (s) | "
             "load (start → end) | peak RSS (MB) | worker peak RSS (MB) |",
             "|---|---:|---:|---:|---:|---:|---:|---|---:|---:|"]
    steps = []
    for which in ("pair", "screen"):
        r = child(Path(__file__), folder, which, *(["--phases"] if a.phases else []))
        if which == "screen":
            steps = [f"{k} {w:.1f} s wall / {c:.1f} s CPU" for k, (w, c) in r["phases"].items()]
        lines.append(f"| {which} | {r['pairs']:,} | {r['stage1']:,} | {r['index_rows']:,} | "
                     f"{r['candidates']:,} | {r['wall']:.1f} | {r['cpu']:.1f} | "
                     f"{r['load'][0]:.1f} → {r['load'][1]:.1f} | {r['peak_mb']:.0f} | "
                     f"{r['child_mb']:.0f} |")
    if steps:
        lines += ["", "Screen steps: " + "; ".join(steps) + "."]
    lines += ["", "Command: `python benchmarks/bench_events.py --persons "
              f"{a.persons}{' --phases' if a.phases else ''}` (DuckDB builds the analysis rows "
              "and their bins; defaults on)."]
    publish("events", lines)


if __name__ == "__main__":
    main()
