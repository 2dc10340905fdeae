"""Shared pieces of the scale benchmarks: a generated Parquet folder, child-process measurement.

The data are invented (simulated registry-like columns, no real setting): running variables
``r0..`` alternate between an integer score (exact-support bins), a lab value recorded to one
decimal (exact-support bins) and a continuous score (fixed-width bins); treatments ``t0..`` are
0/1 with a planted jump at a round cutoff of one running variable each; covariates ``c0..`` are
smooth, one with 5% missing values.  The irregular table (``irregular=True``) puts at every
second position a skewed lab value or a half-integer score, both with 999 missing codes, or a
coarse float32 lattice.  Files of ``rows_per_file`` rows keep generation memory flat.
"""
from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
DATA = HERE / "data"
RESULTS = HERE / "results"
CUTOFFS = (60.0, 6.5, 0.0,          # per running-variable type: integer, decimal, continuous,
           7.0, 21.5, 50.0)         # and (irregular table) skewed, half lattice, coarse lattice
DATE_START = 16436                  # 2015-01-01 as days since 1970-01-01
DATE_DAYS = 3653                    # ten years of visit dates


def running_values(rng, kind: int, n: int) -> np.ndarray:
    if kind == 0:
        return rng.integers(18, 100, n).astype(np.int16)
    if kind == 1:
        return np.round(rng.normal(6.0, 1.2, n), 1)
    if kind == 3:       # a skewed lab value with a long right tail, 0.5% coded 999 for missing
        v = rng.lognormal(1.6, 0.7, n)
        v[rng.random(n) < 0.005] = 999.0
        return v
    if kind == 4:       # a score on a half-integer lattice, 3% coded 999 for missing
        v = np.round(rng.normal(20.0, 4.0, n) * 2) / 2
        v[rng.random(n) < 0.03] = 999.0
        return v
    if kind == 5:       # a coarse lattice (multiples of 5) stored as float32
        return (rng.integers(0, 21, n) * 5).astype(np.float32)
    return rng.normal(0.0, 1.0, n)


def generate(folder: Path, rows: int, n_running: int, n_treat: int, n_cov: int, seed: int = 1,
             rows_per_file: int = 2_000_000, dated: bool = False,
             irregular: bool = False) -> Path:
    """Write the folder unless it already holds a complete copy (marker file).

    ``dated`` adds a ``visit`` date column spread evenly over ten years (2015-01-01 to
    2024-12-31), as a registry extract nearly always has one.  ``irregular`` makes every
    second running variable one of the shapes real extracts have: a skewed lab value and a
    half-integer score, both with 999 missing codes, and a coarse float32 lattice.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq
    marker = folder / "_complete"
    if marker.exists():
        return folder
    folder.mkdir(parents=True, exist_ok=True)
    for old in folder.glob("*.parquet"):
        old.unlink()
    rng = np.random.default_rng(seed)
    for i, start in enumerate(range(0, rows, rows_per_file)):
        m = min(rows_per_file, rows - start)
        kinds = [_kind(j, irregular) for j in range(n_running)]
        cols = {f"r{j}": running_values(rng, kinds[j], m) for j in range(n_running)}
        for t in range(n_treat):
            j = t % n_running
            above = np.asarray(cols[f"r{j}"], float) >= CUTOFFS[kinds[j]]
            cols[f"t{t}"] = (rng.random(m) < 0.15 + 0.4 * above).astype(np.int8)
        for c in range(n_cov):
            v = rng.normal(0.0, 1.0, m).astype(np.float32)
            if c == 0:
                v[rng.random(m) < 0.05] = np.nan
            cols[f"c{c}"] = v
        if dated:
            days = rng.integers(0, DATE_DAYS, m).astype("int32")
            cols["visit"] = pa.array(days + DATE_START, pa.date32())
        pq.write_table(pa.table(cols), folder / f"part-{i:04d}.parquet", row_group_size=500_000)
    marker.write_text(f"{rows}\n")
    return folder


def _kind(j: int, irregular: bool) -> int:
    """Type of running variable r<j>: 0-2 cycle (integer, decimal, continuous); the irregular
    table puts a skewed, half-lattice or coarse variable (3-5) at every odd position."""
    if irregular and j % 2:
        return 3 + (j // 2) % 3
    return j % 3


def spec_for(folder: Path, n_running: int, n_treat: int, n_cov: int, batch_rows: int = 1_000_000,
             dated: bool = False):
    data = {"source": str(folder), "batch_rows": batch_rows}
    if "irregular" in Path(folder).name:
        data["missing"] = [999]         # the irregular table's missing code, declared
    if dated:
        data["date"] = "visit"
    return {"title": "scale benchmark", "data": data,
            "running": [{"column": f"r{j}"} for j in range(n_running)],
            "treatments": {"columns": [f"t{t}" for t in range(n_treat)]},
            "covariates": {"columns": [f"c{c}" for c in range(n_cov)]}}


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def child_peak_rss_mb() -> float:
    """Peak RSS of the largest joined child (the scan's forked worker; it shares the parent's
    pages copy-on-write, so parent + child overstates their joint use)."""
    return resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024


def load() -> str:
    """The 1-, 5- and 15-minute load averages now (other developers share the 2 cores)."""
    return "/".join(f"{v:.1f}" for v in os.getloadavg())


def cpu_seconds() -> float:
    """User + system CPU time of this process so far (less distorted than wall time on a shared machine)."""
    u = resource.getrusage(resource.RUSAGE_SELF)
    c = resource.getrusage(resource.RUSAGE_CHILDREN)      # the scan's forked worker, once joined
    return u.ru_utime + u.ru_stime + c.ru_utime + c.ru_stime


def child(script: Path, *args) -> dict:
    """Run ``script --child ARGS`` in a fresh interpreter (own peak RSS) and parse its JSON line."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    out = subprocess.run([sys.executable, str(script), "--child", *map(str, args)], env=env,
                         capture_output=True, text=True, check=False)
    if out.returncode != 0:
        raise RuntimeError(out.stderr[-3000:])
    return json.loads(out.stdout.strip().splitlines()[-1])


def timed(fn):
    """(value, wall seconds, CPU seconds) of ``fn()``."""
    t0, c0 = time.perf_counter(), cpu_seconds()
    value = fn()
    return value, time.perf_counter() - t0, cpu_seconds() - c0


def write_section(name: str, text: str) -> Path:
    """Replace this script's section of benchmarks/results/scale.md (other sections stay)."""
    RESULTS.mkdir(exist_ok=True)
    path = RESULTS / "scale.md"
    old = path.read_text() if path.exists() else "# Scale benchmarks\n"
    start, end = f"<!-- {name} -->", f"<!-- /{name} -->"
    block = f"{start}\n{text.rstrip()}\n{end}"
    if start in old:
        head, rest = old.split(start, 1)
        new = head + block + rest.split(end, 1)[1]
    else:
        new = old.rstrip() + "\n\n" + block + "\n"
    path.write_text(new)
    return path


def publish(name: str, lines: list[str]) -> None:
    """Print a benchmark's section and write it into benchmarks/results/scale.md."""
    text = "\n".join(lines)
    print(text)
    print(write_section(name, text))


def machine() -> str:
    import platform
    load = os.getloadavg()[0]
    return (f"{platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
            f"load average {load:.1f} at start (a 1-minute average above 2 means other jobs shared the 2 cores)")
