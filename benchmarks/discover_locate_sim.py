"""Simulated breaks for the location benchmark and its fast test (invented data, simulation only).

Designs (running variable × uptake), each with one planted break at ``c`` (x ≥ c treated more):

* running variables: ``uniform`` (0–1, fixed-width bins), ``lognormal`` (fixed-width bins),
  ``int`` (whole numbers 0–119), ``half`` (half-integers −40.5 … 39.5, a lattice whose break lies
  between two recorded values, as birth quarters measured from a date);
* uptakes: ``zero_right`` — a declining share that falls to exactly 0 at the break and stays 0
  (uptake constant on one side, the case where a t peaks in the wrong place);
  ``zero_left`` — nobody treated below the break, a rising share above it;
  ``noisy`` — a sloped share on both sides with a jump of 0.15.

Each replication draws ``n`` rows of one design and runs the discovery search
(:func:`scanner.breaks.search_pair`) on them, as the scan does on its search half.
"""
from __future__ import annotations

import numpy as np

from benchmarks.discover_sim import binned as _binned_shape
from scanner.breaks import search_pair
from scanner.engines.local import exact_bins
from scanner.engines.plan import nice_width

RUNNING = {
    "uniform": (lambda r, n: r.uniform(0, 1, n), 0.437, False),
    "lognormal": (lambda r, n: r.lognormal(3.4, 0.35, n), 33.3, False),
    "int": (lambda r, n: r.integers(0, 120, n).astype(float), 61.0, True),
    "half": (lambda r, n: r.integers(-40, 40, n) + 0.5, 14.0, True),
}
UPTAKES = ("zero_right", "zero_left", "noisy")


def uptake(kind: str, x: np.ndarray, c: float, scale: float) -> tuple[np.ndarray, float]:
    """Uptake probability of each row and the planted jump's sign."""
    z = np.clip((x - c) / scale, -3, 3)
    right = x >= c
    if kind == "zero_right":
        return np.where(right, 0.0, 0.12 - 0.08 * z), -1.0
    if kind == "zero_left":
        return np.where(right, 0.2 + 0.1 * z, 0.0), 1.0
    return 0.3 + 0.05 * z + 0.15 * right, 1.0


def design_bins(name: str, kind: str, rng, n: int):
    sample, c, exact = RUNNING[name]
    x = sample(rng, n)
    q1, q3 = np.quantile(x, [0.25, 0.75])
    p, sign = uptake(kind, x, c, q3 - q1)
    d = {"d": (rng.random(n) < np.clip(p, 0, 1)).astype(float)}
    if exact:
        return exact_bins(name, x, d, half=np.full(n, -1, np.int8)), c, sign
    return _binned_shape(name, x, {"d": p}, rng, split=False, bins=500), c, sign


def locate_rep(rep: int, n: int = 25_000, draws: int = 500, designs=None) -> dict:
    """One replication of every design: location error, sign, set coverage of the first break."""
    out = {}
    for name in RUNNING:
        for kind in UPTAKES:
            if designs and (name, kind) not in designs:
                continue
            rng = np.random.default_rng([rep, list(RUNNING).index(name), UPTAKES.index(kind)])
            st, c, sign = design_bins(name, kind, rng, n)
            ps = search_pair(st, "d", seed=rep, draws=draws)
            gap = 1.0 if RUNNING[name][2] else None
            if not ps.peaks:
                out[f"{name}/{kind}"] = {"found": False, "h": ps.bandwidth, "gap": gap}
                continue
            pk = ps.peaks[0]
            covered = (pk.ci_low < c <= pk.ci_high) if pk.ci_low_open else (pk.ci_low <= c <= pk.ci_high)
            out[f"{name}/{kind}"] = {
                "found": True, "h": ps.bandwidth, "gap": gap, "location": pk.location,
                "error": abs(pk.location - c), "sign_ok": bool(np.sign(pk.jump) == sign),
                "covered": bool(covered), "set_width": pk.ci_high - pk.ci_low,
                "n_breaks": len(ps.peaks)}
    return out


def close_enough(cell: dict) -> bool:
    """Within one support gap on a lattice, within h/4 on a continuous running variable."""
    if not cell["found"]:
        return False
    return cell["error"] <= (cell["gap"] + 1e-9 if cell["gap"] else cell["h"] / 4)
