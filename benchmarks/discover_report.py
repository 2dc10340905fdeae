"""Compose benchmarks/results/discovery.md from the JSON files the discovery benchmarks write."""
from __future__ import annotations

import json
from pathlib import Path

RESULTS = Path(__file__).resolve().parent / "results"


def write_markdown() -> Path:
    parts = ["# Discovery benchmarks (issue 5)\n",
             "Simulated registries (invented data). Regenerate with the commands shown; each "
             "section is rewritten by its script.\n"]
    for name in ("speed", "null", "planted", "locate"):
        p = RESULTS / f"discovery_{name}.json"
        if p.exists():
            parts.append(json.loads(p.read_text())["markdown"])
    out = RESULTS / "discovery.md"
    out.write_text("\n".join(parts) + "\n", encoding="utf-8")
    return out


def save(name: str, figures: dict, markdown: str) -> Path:
    RESULTS.mkdir(parents=True, exist_ok=True)
    (RESULTS / f"discovery_{name}.json").write_text(
        json.dumps({"figures": figures, "markdown": markdown}, indent=2) + "\n", encoding="utf-8")
    return write_markdown()


def parse_and_run(rep, reps: int, workers: int, n: int | None = None):
    """The command line shared by the discovery benchmarks: ``--reps``, ``--workers`` and, when
    the replication takes a sample size, ``--n``; runs the replications and returns
    ``(args, results, seconds)``."""
    import argparse
    import functools
    import time
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=reps)
    ap.add_argument("--workers", type=int, default=workers)
    if n is not None:
        ap.add_argument("--n", type=int, default=n)
    a = ap.parse_args()
    fn = functools.partial(rep, n=a.n) if n is not None else rep
    t0 = time.time()
    res = run_reps(fn, a.reps, a.workers)
    return a, res, time.time() - t0


def run_reps(rep, reps: int, workers: int) -> list:
    """Run ``rep(i)`` for i < reps on ``workers`` processes, printing one JSON line per replication."""
    import json
    from multiprocessing import Pool
    out = []
    with Pool(workers) as pool:
        for i, r in enumerate(pool.imap(rep, range(reps), chunksize=1), 1):
            out.append(r)
            print(json.dumps({"rep": i, **r}), flush=True)   # progress
    return out
