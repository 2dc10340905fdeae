"""Null registry: how often does the discovery search confirm a cutoff that is not there?

20 running variables of different shapes × 3 treatments with smooth uptake (linear, logistic,
wave), n = 100,000 rows, no jump anywhere; discovery on half 0, confirmation on half 1, q-values
over the 60 scans.  Done-when (issue 5): share of replications with any confirmed discovery at
alpha = 0.05 is at most 0.05 over at least 200 replications.

Run: ``nice -n 19 env PYTHONPATH=. python benchmarks/bench_discover_null.py [--reps 500 --workers 2]``
"""
from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")   # several small factorisations: threads only contend
os.environ.setdefault("OMP_NUM_THREADS", "1")

from collections import Counter

import numpy as np

from benchmarks.discover_sim import SHAPES, null_rep
from benchmarks.discover_report import parse_and_run, save


def main():
    a, res, secs = parse_and_run(null_rep, reps=200, workers=2, n=100_000)
    any_conf = np.mean([r["confirmed"] > 0 for r in res])
    hits = Counter(h for r in res for h in r["hit_pairs"])
    conf = Counter(h for r in res for h in r["confirmed_pairs"])
    pairs = res[0]["pairs"]
    search_rate = sum(r["search_hits"] for r in res) / (a.reps * pairs)
    by_t = {t: sum(v for k, v in hits.items() if k.endswith(t)) / (a.reps * len(SHAPES))
            for t in ("t_linear", "t_logistic", "t_wave")}
    coarse = [k for k, (_, ex) in SHAPES.items() if ex]
    cont_logit = sum(v for k, v in hits.items() if k.endswith("t_logistic") and k.split("×")[0] not in coarse)
    n_cont = len(SHAPES) - len(coarse)
    conf_logit = np.mean([any(p.endswith("t_logistic") for p in r["confirmed_pairs"]) for r in res])
    fig = {"reps": a.reps, "n": a.n, "pairs": pairs, "share_any_confirmed": float(any_conf),
           "search_hit_rate_per_pair": search_rate, "search_hit_rate_by_treatment": by_t,
           "logistic_search_rate_continuous": cont_logit / (a.reps * n_cont),
           "share_any_confirmed_logistic": float(conf_logit),
           "grid_points_per_rep": res[0]["grid_points"], "n_tested": res[0]["n_tested"],
           "top_search_hits": hits.most_common(6), "confirmed_pairs": dict(conf), "seconds": secs}
    se = np.sqrt(any_conf * (1 - any_conf) / a.reps)
    md = f"""## Null registry (no jump anywhere)

`nice -n 19 env PYTHONPATH=. python benchmarks/bench_discover_null.py --reps {a.reps} --workers {a.workers}` ({secs / 60:.1f} min)

{len(SHAPES)} running variables × 3 smooth uptakes, n = {a.n:,}, {a.reps} replications, alpha = 0.05;
{res[0]['grid_points']:,} grid cutoffs examined per replication, {res[0]['n_tested']} tests in the q-value family.

| figure | value | target |
|---|---|---|
| share of replications with any confirmed discovery | **{any_conf:.3f}** (± {se:.3f} s.e.) | ≤ 0.05 |
| share with a confirmed discovery on a logistic uptake | {conf_logit:.3f} | ≤ 0.05 |
| search-adjusted test on half 0 alone: rejection rate per pair | {search_rate:.3f} | ≈ 0.05 |
| … linear / logistic / wave uptakes | {by_t['t_linear']:.3f} / {by_t['t_logistic']:.3f} / {by_t['t_wave']:.3f} | ≈ 0.05 |
| … logistic uptake on the {n_cont} continuous shapes | {cont_logit / (a.reps * n_cont):.3f} | ≤ 0.05 |

Most frequent half-0 search hits: {', '.join(f'{k} ({v})' for k, v in hits.most_common(6))}.
Confirmed (false) discoveries by pair: {dict(conf) or 'none'}.
The half-0 search is a local linear scan: where a coarse support meets a curved uptake (binom30
has four support points in its IQR) its jumps carry smoothing bias, so its rejection rate there
exceeds alpha. Confirmation on half 1 allows for that bias (bound of Kolesár & Rothe 2018).
"""
    print(md)
    print("wrote", save("null", fig, md))


if __name__ == "__main__":
    main()
