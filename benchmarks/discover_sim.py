"""Simulated registries for the discovery benchmarks and their fast test versions.

Rows are drawn, split into halves at random and folded into BinnedStats with the local engine's
own ``fold`` (no files, no batching), then searched with :func:`scanner.scan.discovery_step`,
the same code path ``cutscan scan`` runs.  All data are invented (simulation only).
"""
from __future__ import annotations

import numpy as np

from scanner.bins import BinnedStats
from scanner.engines.local import exact_bins
from scanner.engines.plan import nice_width
from scanner.score import finalize
from scanner.spec import RunningSpec, ScanSpec


def _mix(rng, n):
    a = rng.random(n) < 0.6
    return np.where(a, rng.normal(40, 6, n), rng.normal(60, 10, n))


# name: (sampler, exact support?) — 20 shapes: smooth, skewed, bounded, U-shaped, bimodal,
# integer and rounded supports.
SHAPES = {
    "uniform": (lambda r, n: r.uniform(0, 1, n), False),
    "normal": (lambda r, n: r.normal(50, 10, n), False),
    "lognormal": (lambda r, n: r.lognormal(3.4, 0.35, n), False),
    "beta25": (lambda r, n: r.beta(2, 5, n), False),
    "gamma2": (lambda r, n: r.gamma(2.0, 10.0, n), False),
    "exponential": (lambda r, n: r.exponential(5.0, n), False),
    "student5": (lambda r, n: r.standard_t(5, n), False),
    "mixture": (_mix, False),
    "triangular": (lambda r, n: r.triangular(0, 3, 10, n), False),
    "ushape": (lambda r, n: r.beta(0.7, 0.7, n), False),
    "weibull": (lambda r, n: 20 * r.weibull(1.5, n), False),
    "chisq3": (lambda r, n: r.chisquare(3, n), False),
    "laplace": (lambda r, n: r.laplace(0, 2, n), False),
    "int100": (lambda r, n: r.integers(0, 100, n).astype(float), True),
    "age": (lambda r, n: r.integers(18, 91, n).astype(float), True),
    "poisson20": (lambda r, n: r.poisson(20, n).astype(float), True),
    "binom30": (lambda r, n: r.binomial(30, 0.4, n).astype(float), True),
    "round01": (lambda r, n: np.round(r.normal(6, 0.9, n), 1), True),
    "round1": (lambda r, n: np.round(r.lognormal(4, 0.3, n)), True),
    "int1000": (lambda r, n: r.integers(0, 1000, n).astype(float), True),
}


def _scale(name):
    """Median and IQR of a shape from a fixed large sample (constant across replications)."""
    x = SHAPES[name][0](np.random.default_rng(12345), 200_000)
    q1, q2, q3 = np.quantile(x, [0.25, 0.5, 0.75])
    return q2, max(q3 - q1, 1e-9)


SCALES = {k: _scale(k) for k in SHAPES}


def smooth_uptakes(name, x):
    """Three smooth uptake curves (no jump): linear, logistic, wave; probabilities in (0, 1)."""
    med, iqr = SCALES[name]
    z = np.clip((x - med) / iqr, -4, 4)
    return {"t_linear": 0.25 + 0.05 * z,
            "t_logistic": 0.05 + 0.6 / (1 + np.exp(-z / 0.4)),
            "t_wave": 0.35 + 0.12 * np.sin(1.5 * z)}


BENCH_BINS = 500   # fixed-width bins across the central 98% (the engine's default is ~2000)


def binned(name, x, probs: dict, rng, split=True, width=None, bins=2000) -> BinnedStats:
    """BinnedStats (half keys 0/1 when ``split``) of rows x with 0/1 uptakes drawn from ``probs``.

    Continuous shapes get fixed-width 1-2-5 bins, about ``bins`` across the central 98%.
    """
    exact = SHAPES[name][1] if name in SHAPES else width is None
    cols = {k: (rng.random(x.size) < np.clip(p, 0, 1)).astype(float) for k, p in probs.items()}
    names = tuple(cols)
    half = (rng.random(x.size) < 0.5).astype(np.int8) if split else np.full(x.size, -1, np.int8)
    st = exact_bins(name, x, cols, half=half)
    if exact:
        return st
    lo, hi = np.quantile(x, [0.01, 0.99])
    return st.to_width(width or nice_width(hi - lo, bins), 0.0).validate()


def spec_for(stats: dict, treatments, seed=1, alpha=0.05, confirm=True) -> ScanSpec:
    return ScanSpec(running=tuple(RunningSpec(r) for r in stats), treatments=tuple(treatments),
                    alpha=alpha, seed=seed, confirm=confirm)


def search(stats: dict, treatments, seed=1, alpha=0.05, screen=True):
    """Run the scan's discovery step and the q-values; return (rows, extra_p, summary).

    ``screen`` skips the multiplier simulation for pairs that cannot reach alpha (exact same
    decisions, q-values no larger; see scanner.discover.search_pair).
    """
    from scanner.scan import discovery_step
    spec = spec_for(stats, treatments, seed, alpha)
    rows = []
    extra, summary = discovery_step(stats, rows, spec, screen=screen)
    rows = finalize(rows, alpha, extra)
    return rows, extra, summary


NOT_CONFIRMED = ("no jump", "inconclusive", "not estimable")


def confirmed(rows, alpha=0.05):
    """Discovered rows that survive the held-out test: q below alpha and a verdict that claims a
    jump ("inconclusive" says the held-out half cannot tell, which is not a discovery)."""
    return [r for r in rows if r["origin"] == "discovered" and r["verdict"] not in NOT_CONFIRMED
            and r["q_value"] < alpha]


def null_rep(rep: int, n: int = 100_000, shapes=None, alpha=0.05):
    """One null registry: every shape × three smooth uptakes, no jump anywhere."""
    rng = np.random.default_rng(1000 + rep)
    shapes = shapes or list(SHAPES)
    stats = {}
    for name in shapes:
        x = SHAPES[name][0](rng, n)
        stats[name] = binned(name, x, smooth_uptakes(name, x), rng, bins=BENCH_BINS)
    rows, extra, summary = search(stats, ["t_linear", "t_logistic", "t_wave"], seed=rep, alpha=alpha)
    searched = sum(1 for p in summary["pairs"] if p["search_p"] is not None and p["search_p"] < alpha)
    hits = [f"{p['running']}×{p['treatment']}" for p in summary["pairs"]
            if p["search_p"] is not None and p["search_p"] < alpha]
    return {"confirmed": len(confirmed(rows, alpha)), "search_hits": searched, "hit_pairs": hits,
            "confirmed_pairs": [f"{r['running']}×{r['treatment']}" for r in confirmed(rows, alpha)],
            "pairs": len(summary["pairs"]), "n_tested": rows[0]["n_tested"] if rows else len(extra),
            "grid_points": summary["n_grid_points"]}


# Planted designs: shape, jump location (non-round), baseline uptake curve.
PLANTED = {"uniform": 0.437, "normal": 53.7, "lognormal": 33.3, "age": 61.0}


def planted_rep(rep: int, n: int = 50_000, jump: float = 0.15, alpha=0.05):
    """Per shape, one treatment with a jump of ``jump`` at a non-round point, one without."""
    rng = np.random.default_rng(5000 + rep)
    stats = {}
    for name, c in PLANTED.items():
        x = SHAPES[name][0](rng, n)
        med, iqr = SCALES[name]
        z = (x - med) / iqr
        base = 0.3 + 0.05 * np.clip(z, -3, 3)
        stats[name] = binned(name, x, {"t_jump": base + jump * (x >= c), "t_none": base}, rng,
                             bins=BENCH_BINS)
    rows, extra, summary = search(stats, ["t_jump", "t_none"], seed=rep, alpha=alpha)
    out = {}
    for name, c in PLANTED.items():
        found = [r for r in confirmed(rows, alpha) if r["running"] == name and r["treatment"] == "t_jump"]
        h = next(p["bandwidth"] for p in summary["pairs"] if p["running"] == name and p["treatment"] == "t_jump")
        best = min(found, key=lambda r: abs(r["location"] - c)) if found else None
        out[name] = {"found": best is not None, "h": h,
                     "error": abs(best["location"] - c) if best else None,
                     "covered": bool(best and best["location_ci_low"] <= c <= best["location_ci_high"]),
                     "false": len([r for r in confirmed(rows, alpha) if r["running"] == name and r["treatment"] == "t_none"])}
    return out
