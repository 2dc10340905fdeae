"""Where does the search put a break?  Location, sign and location-set coverage.

Four running variables (uniform and lognormal on fixed-width bins, an integer and a
half-integer lattice) × three uptakes (a share falling to exactly 0 at the break, nobody treated
below it, a sloped share with a jump on both sides), one planted break each, n = 25,000 rows
(the size of a search half).  Targets: location within one support gap (lattice) or h/4
(continuous) in ≥ 95% of replications, sign correct in ≥ 99%, location-set coverage 0.90–0.99.
See benchmarks/discover_locate_sim.py for the designs (invented data).

Run: ``nice -n 10 env PYTHONPATH=. python benchmarks/bench_discover_locate.py [--reps 500 --workers 1]``
"""
from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")


import numpy as np

from benchmarks.discover_locate_sim import RUNNING, UPTAKES, close_enough, locate_rep
from benchmarks.discover_report import parse_and_run, save


def main():
    a, res, secs = parse_and_run(locate_rep, reps=500, workers=1)
    fig, lines = {}, []
    for name in RUNNING:
        for kind in UPTAKES:
            key = f"{name}/{kind}"
            f = [r[key] for r in res]
            found = np.mean([x["found"] for x in f])
            close = np.mean([close_enough(x) for x in f])
            sign = np.mean([x["found"] and x["sign_ok"] for x in f])
            cover = np.mean([x["found"] and x["covered"] for x in f])
            extra = np.mean([x["found"] and x["n_breaks"] > 1 for x in f])
            width = np.median([x["set_width"] for x in f if x["found"]] or [np.nan])
            h = float(np.median([x["h"] for x in f]))
            fig[key] = {"found": float(found), "location_ok": float(close), "sign_ok": float(sign),
                        "set_covers": float(cover), "median_set_width": float(width), "h": h,
                        "extra_breaks_on_search_half": float(extra)}
            tol = "1 gap" if RUNNING[name][2] else f"h/4 = {h / 4:.3g}"
            lines.append(f"| {name} | {kind} | {RUNNING[name][1]:g} | {tol} | {found:.3f} | "
                         f"**{close:.3f}** | **{sign:.3f}** | **{cover:.3f}** | {width:.3g} | {extra:.3f} |")
    allf = [fig[k] for k in fig]
    summary = {k: min(x[k] for x in allf) for k in ("location_ok", "sign_ok")}
    summary["set_covers_min"] = min(x["set_covers"] for x in allf)
    summary["set_covers_max"] = max(x["set_covers"] for x in allf)
    fig["summary"] = summary
    md = f"""## Break location, sign and location set

`nice -n 10 env PYTHONPATH=. python benchmarks/bench_discover_locate.py --reps {a.reps}` ({secs / 60:.1f} min)

One planted break per design, n = 25,000 rows (a search half), {a.reps} replications, alpha = 0.05.
"zero_right": the share falls to exactly 0 at the break; "zero_left": nobody is treated below it;
"noisy": a sloped share on both sides with a jump of 0.15.  Location and sign are those of the
search's first break; the set is its likelihood-ratio location set (on a lattice, the half-open
gap between recorded values).

| running variable | uptake | break | location tolerance | found | location within tolerance (≥ 0.95) | sign correct (≥ 0.99) | set covers (0.90–0.99) | median set width | a second break found on the search half |
|---|---|---|---|---|---|---|---|---|---|
""" + "\n".join(lines) + f"""

Worst design: location {summary['location_ok']:.3f}, sign {summary['sign_ok']:.3f}; set coverage
{summary['set_covers_min']:.3f}–{summary['set_covers_max']:.3f}.  On a lattice with a clear
break the set is the one gap between recorded values that holds the break, so its coverage is
1 by construction: a set cannot be narrower than the gap.  A second break on the search half is
what the held-out confirmation exists for; the null registry measures how often one survives it.
"""
    print(md)
    print("wrote", save("locate", fig, md))


if __name__ == "__main__":
    main()
