"""Simulation designs and coverage loops shared by benchmarks/coverage_cct.py and the tests.

Rows are drawn, folded into exact-support BinnedStats with ``scanner.engines.local.fold`` (the
engine's own binning), and every estimate is then computed from the bins only.

Designs
-------
* ``cct1`` / ``cct2``: Calonico, Cattaneo & Titiunik (2014) Models 1 and 2 — X = 2·Beta(2,4) − 1,
  fifth-order polynomials on each side, ε ~ N(0, 0.1295²), n = 500; true jumps 0.04 and −3.45
  (coefficients from METHODS.md §4, verified there against public replication scripts).
* ``discrete``: invented; 10 support points per side (x = ±0.05, ±0.15, …), strongly curved mean.
* ``fuzzy``: invented; X uniform on [−1, 1], first stage 0.4, effect 1.
* ``lognormal``: invented skewed score; X ~ lognormal(0, 2), cutoff 0.1, n = 200,000, binary
  uptake with P(T = 1) = 0.15 + 0.5·1{X ≥ 0.1} + 0.25·(1 − e^{−X}): true jump 0.5, |μ''| ≈ 0.23
  at the cutoff, while the range reaches thousands of units.
* ``lognormal-binned``: the same rows on fixed-width bins of 0.05 with an edge at the cutoff,
  as the scan bins this score: the left side holds two bins, so no data-driven bandwidth exists.
* ``halfint``: invented half-integer lattice (x = ±0.5, ±1.5, …, ±9.5, cutoff 0 between two
  recorded values), binary uptake, true jump 0.3.
* ``fivepoint``: invented five-point score (1–5, cutoff at 3, which goes right), 4,000 rows,
  true jump 0.4 on a curved outcome.
"""
from __future__ import annotations

import numpy as np
from scipy import stats as sps

from scanner.bins import BinnedStats
from scanner.engines.local import exact_bins
from scanner.estimate import side_data
from scanner.estimate.inference import fuzzy_inference
from scanner.estimate.mse import mse_bandwidth
from scanner.estimate.bandwidth import ensure_support, ik_bandwidth
from scanner.score import MIN_DISTINCT
from scanner.estimate.robust import curvature_bound, honest_best, honest_interval, robust_jump

CCT = {  # METHODS.md §4 (CCT 2014 supplement Models 1 and 2)
    "cct1": ((0.48, 1.27, 7.18, 20.21, 21.54, 7.33), (0.52, 0.84, -3.00, 7.99, -9.01, 3.56), 0.04),
    "cct2": ((3.71, 2.30, 3.28, 1.45, 0.23, 0.03), (0.26, 18.49, -54.81, 74.30, -45.02, 9.83), -3.45),
}
SIGMA = 0.1295


def to_bins(x, cols: dict, pairs=()) -> BinnedStats:
    """Exact-support BinnedStats of rows ``x`` with tracked columns ``cols`` (engine fold)."""
    return exact_bins("x", x, cols, pairs)


def draw_cct(model: str, rng, n: int = 500):
    left, right, tau = CCT[model]
    x = 2 * rng.beta(2, 4, n) - 1
    mu = np.where(x >= 0, np.polyval(right[::-1], x), np.polyval(left[::-1], x))
    return x, mu + rng.normal(0, SIGMA, n), tau


def draw_discrete(rng, n: int = 5000):
    # Invented: 10 support points per side; μ(x) = 2x + 3x² on the left and 0.5 + 2x − 3x² on
    # the right (curved, |μ''| = 6, opposite signs so the biases add), jump 0.5, sd 0.5.
    support = np.r_[-np.arange(0.05, 1.0, 0.1)[::-1], np.arange(0.05, 1.0, 0.1)]
    x = rng.choice(support, n)
    right = x >= 0
    y = 2 * x + np.where(right, 0.5 - 3 * x ** 2, 3 * x ** 2) + rng.normal(0, 0.5, n)
    return np.round(x, 10), y, 0.5


def draw_fuzzy(rng, n: int = 2000):
    # Invented: P(T = 1) = 0.3 + 0.4·1{x ≥ 0} + 0.1x; Y = 0.5 + 0.6x − 0.4x² + 1·T + ε, with
    # uptake endogenous (ε correlated 0.5 with the uptake shock), as in real fuzzy designs.
    x = rng.uniform(-1, 1, n)
    v = rng.normal(size=n)
    t = (sps.norm.cdf(v) < 0.3 + 0.4 * (x >= 0) + 0.1 * x).astype(float)
    eps = 0.5 * (0.5 * v + np.sqrt(0.75) * rng.normal(size=n))
    y = 0.5 + 0.6 * x - 0.4 * x ** 2 + 1.0 * t + eps
    return x, t, y, 1.0


def draw_lognormal(rng, n: int = 200_000):
    # Invented: skewed score, cutoff 0.1 (centred below), binary uptake; jump 0.5.
    x = rng.lognormal(0.0, 2.0, n)
    p = 0.15 + 0.5 * (x >= 0.1) + 0.25 * (1 - np.exp(-x))
    return x - 0.1, (rng.random(n) < p).astype(float), 0.5


def draw_halfint(rng, n: int = 6000):
    # Invented: half-integer lattice ±0.5 … ±9.5, cutoff 0 between recorded values; binary
    # uptake 0.2 + 0.3·1{x > 0} + 0.02x − 0.001x² (curved), jump 0.3.
    support = np.arange(-9.5, 10.0, 1.0)
    x = rng.choice(support, n)
    p = 0.2 + 0.3 * (x > 0) + 0.02 * x - 0.001 * x * x + 0.15
    return x, (rng.random(n) < p).astype(float), 0.3


def draw_fivepoint(rng, n: int = 4000):
    # Invented: scores 1–5, cutoff 3 (the point 3 goes right), centred at 3 below; y has a
    # curved mean 0.2·s − 0.05·s² + 0.4·1{s ≥ 3} and sd 0.5; jump 0.4.
    s = rng.integers(1, 6, n).astype(float)
    y = 0.2 * s - 0.05 * s * s + 0.4 * (s >= 3) + rng.normal(0, 0.5, n)
    return s - 3.0, y, 0.4


DRAW = {"discrete": draw_discrete, "lognormal": draw_lognormal, "halfint": draw_halfint,
        "fivepoint": draw_fivepoint, "lognormal-binned": draw_lognormal}
# Lattice designs: the bandwidth is widened to MIN_DISTINCT support values per side, as the scan
# does, and the bias-aware column is taken at its shortest bandwidth (``honest_best``).
COARSE = ("discrete", "halfint", "fivepoint", "lognormal-binned")
WIDTH = {"lognormal-binned": 0.05}
# The true max |μ''| of the lattice designs (from their formulas above): the bias-aware interval
# is also computed at this M, to separate over-coverage that comes from the estimated M from
# over-coverage that comes from μ not being the worst case of the class (the worst case bends
# the two sides in opposite directions at full curvature; exactly attained only by `discrete`).
TRUE_M = {"discrete": 6.0, "halfint": 0.002, "fivepoint": 0.1}


def distinct_inside(d, h) -> int:
    """Fewest distinct support values with positive triangular weight on a side (|u| < h)."""
    hl, hr = h
    left = np.unique(d.u[~d.right & (-d.u < hl)]).size
    right = np.unique(d.u[d.right & (d.u < hr)]).size
    return int(min(left, right))


def one_sharp(x, y, selector="mse", widen=False, width=None):
    """(robust fit, honest fit, bandwidth choice, scan-coarse?) for one sample.

    The last item applies the scan's rule (``scan.evaluate``): a candidate is coarse, and reports
    the bias-aware interval, when a side has fewer than MIN_DISTINCT distinct values inside h.
    """
    st = to_bins(x, {"y": y})
    if width:
        st = st.to_width(width)
    d = side_data(st, "y", 0.0)
    ch = mse_bandwidth(d, cer=selector == "cer", per_side=selector == "mse-sides")
    h, b = (ch.h_left, ch.h_right), (ch.b_left, ch.b_right)
    if selector == "ik":
        hi = ik_bandwidth(st, "y", 0.0, data=d).h
        h = (hi, hi)
    if widen:
        # As the scan does: at least MIN_DISTINCT support points per side inside h.
        hw, _ = ensure_support(max(h), d, 1, minimum=MIN_DISTINCT)
        h = (hw, hw)
        b = (max(b[0], hw), max(b[1], hw))
    fit = robust_jump(d, h, b)
    M = curvature_bound(d, window=b)   # as the scan: local quadratic fits at the bias pilot
    hon = honest_best(d, M)[0] if widen else honest_interval(d, h, M)
    return fit, hon, ch, distinct_inside(d, h) < MIN_DISTINCT


def coverage_sharp(design: str, reps: int, seed: int = 1, selector="mse") -> dict:
    """Coverage of conventional, robust and honest 95% intervals over ``reps`` samples."""
    rng = np.random.default_rng(seed)
    hits = {"conventional": 0, "robust": 0, "honest": 0, "reported": 0, "honest_true_M": 0}
    ok = n_coarse = 0
    hs, lengths = [], {"conventional": [], "robust": [], "honest": [], "reported": [],
                       "honest_true_M": []}
    coarse = design in COARSE
    for _ in range(reps):
        if design in DRAW:
            x, y, tau = DRAW[design](rng)
        else:
            x, y, tau = draw_cct(design, rng)
        fit, hon, ch, scan_coarse = one_sharp(x, y, selector, widen=coarse,
                                              width=WIDTH.get(design))
        # As the scan: a candidate with fewer than MIN_DISTINCT support values on a side inside
        # h reports the bias-aware interval, others the robust one (a lattice with enough values
        # per side, e.g. the half-integer one, reports the robust interval).
        n_coarse += scan_coarse
        rep = (hon.ci_low, hon.ci_high) if scan_coarse else (fit.ci_low, fit.ci_high)
        if not np.isfinite(rep[0]):
            continue
        ok += 1
        hs.append(fit.h_left)
        true_m = (float("nan"),) * 2
        if design in TRUE_M:
            t = honest_best(side_data(to_bins(x, {"y": y}), "y", 0.0), TRUE_M[design])[0]
            true_m = (t.ci_low, t.ci_high)
        for k, lo, hi in (("conventional", fit.ci_low_conventional, fit.ci_high_conventional),
                          ("robust", fit.ci_low, fit.ci_high), ("honest", hon.ci_low, hon.ci_high),
                          ("reported", *rep), ("honest_true_M", *true_m)):
            if np.isfinite(lo) and np.isfinite(hi):
                hits[k] += bool(lo <= tau <= hi)
                lengths[k].append(hi - lo)
    # Coverage over the replications where that interval exists (NaN when it never does).
    out = {k: v / len(lengths[k]) if lengths[k] else float("nan") for k, v in hits.items()}
    out.update(reps=ok, h_median=float(np.median(hs)), share_coarse=n_coarse / reps,
               **{f"length_{k}": float(np.median(v)) if v else float("nan")
                  for k, v in lengths.items()})
    return out


def coverage_fuzzy(reps: int, seed: int = 2) -> dict:
    """Coverage of conventional and robust 95% intervals for the fuzzy design (first stage 0.4)."""
    rng = np.random.default_rng(seed)
    hits = {"conventional": 0, "robust": 0}
    ok = 0
    hs = []
    for _ in range(reps):
        x, t, y, tau = draw_fuzzy(rng)
        st = to_bins(x, {"t": t, "y": y}, (("t", "y"),))
        fit, sel = fuzzy_inference(st, "t", "y", 0.0, min_distinct=1)
        if not np.isfinite(fit.se_robust):
            continue
        ok += 1
        hs.append(sel.h_left)
        hits["conventional"] += bool(fit.ci_low_conventional <= tau <= fit.ci_high_conventional)
        hits["robust"] += bool(fit.ci_low <= tau <= fit.ci_high)
    out = {k: v / ok for k, v in hits.items()}
    out.update(reps=ok, h_median=float(np.median(hs)))
    return out
