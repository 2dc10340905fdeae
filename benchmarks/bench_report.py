"""How long ``cutscan report DIR`` takes to rebuild the demo report.

Runs ``cutscan demo`` once (which draws every figure and fills the output folder's figure
cache), then times ``cutscan report DIR`` in fresh processes: with the cache (the rebuild a user
runs) and, for reference, with the cache removed (every figure drawn again).  Invented data.

    PYTHONPATH=. python benchmarks/bench_report.py [--rows 200000] [--repeats 3]

writes benchmarks/results/report.md.  Target: the rebuild with its cache in 2 s or less.
"""
from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def run(*args) -> float:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    t = time.perf_counter()
    subprocess.run([sys.executable, "-m", "scanner", *map(str, args)], check=True, env=env,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "results" / "report.md"))
    a = ap.parse_args()
    work = Path(tempfile.mkdtemp(prefix="cutscan-bench-report-"))
    try:
        out = work / "demo"
        demo = run("demo", "--out", out, "--rows", a.rows, "--quiet")
        warm = [run("report", out) for _ in range(a.repeats)]
        cold = []
        for _ in range(a.repeats):
            shutil.rmtree(out / ".figures", ignore_errors=True)
            cold.append(run("report", out))
        n_fig = len(list((out / ".figures").glob("*.b64")))
    finally:
        shutil.rmtree(work, ignore_errors=True)
    text = "\n".join([
        "# Rebuilding the demo report", "",
        f"Command: `PYTHONPATH=. python benchmarks/bench_report.py --rows {a.rows} --repeats {a.repeats}`",
        f"(each timing is a fresh `python -m scanner report DIR` process, wall clock; "
        f"{os.cpu_count()} cores shared with other work, load average "
        f"{os.getloadavg()[0]:.1f} at the end)", "",
        f"- `cutscan demo --rows {a.rows}` (generate, scan, write, draw {n_fig} figures): {demo:.1f} s",
        f"- `cutscan report DIR`, figure cache present: median {statistics.median(warm):.2f} s "
        f"(runs: {', '.join(f'{t:.2f}' for t in warm)}) — target 2 s",
        f"- `cutscan report DIR`, cache removed (every figure drawn): median "
        f"{statistics.median(cold):.2f} s (runs: {', '.join(f'{t:.2f}' for t in cold)})", ""])
    Path(a.out).write_text(text + "\n", encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
