"""Where does uptake actually jump?  A grid search for the cutoff near a declared value.

For each candidate cutoff on a grid around the declared value(s) the local polynomial jump is
fitted with one fixed bandwidth, and the candidate with the largest |t| is the location
estimate.  This is the estimator of Porter & Yu (2015) in its simplest form (argmax of the
standardised local jump over a set of candidate points); its t-statistic is *not* a valid test
of "a jump exists" after the search — use the declared cutoff's own fit for that.

This is a deliberately small, local tool for ``cutscan check``.  The data-driven discovery of
undeclared cutoffs (scanner/discover.py) has its own search and search-adjusted inference and
may replace this function once merged.
"""
from __future__ import annotations

from dataclasses import dataclass, asdict

import numpy as np

from .bins import BinnedStats
from .estimate.local import fit_jump

MAX_GRID = 201     # candidate points at most; a finer support is thinned evenly


@dataclass(frozen=True)
class Location:
    """The grid point with the largest |t| and what it was chosen from."""

    cutoff: float
    jump: float
    se: float
    t: float
    declared: tuple[float, ...]
    nearest_declared: float
    grid_low: float
    grid_high: float
    grid_points: int
    reason: str | None = None

    def to_dict(self) -> dict:
        d = asdict(self)
        d["declared"] = list(self.declared)
        return d


def grid(stats: BinnedStats, low: float, high: float) -> np.ndarray:
    """Candidate cutoffs in [low, high]: support values (exact bins) or bin edges (fixed width)."""
    st = stats.pooled()
    if st.kind == "exact":
        pts = np.unique(st.key[st.n > 0])
    else:
        k0, k1 = np.floor((low - st.origin) / st.width), np.ceil((high - st.origin) / st.width)
        pts = st.origin + st.width * np.arange(k0, k1 + 1)
    pts = pts[(pts >= low) & (pts <= high)]
    if pts.size > MAX_GRID:
        pts = pts[np.unique(np.linspace(0, pts.size - 1, MAX_GRID).round().astype(int))]
    return pts


def locate(stats: BinnedStats, column: str, declared, bandwidth: float, reach: float | None = None,
           kernel: str = "triangular", degree: int = 1, right_closed: bool = True) -> Location:
    """Location estimate of the jump in ``column`` near the declared cutoff(s).

    Parameters
    ----------
    stats : BinnedStats of the running variable (period keys are pooled).
    column : tracked 0/1 treatment column.
    declared : one cutoff or several (old and new values of a changed rule).
    bandwidth : fixed half-width of every local fit (running-variable units).
    reach : the grid spans [min(declared) − reach, max(declared) + reach]; default half the
        bandwidth, so a candidate's window still overlaps the declared one's.

    Returns
    -------
    Location; NaN with a reason when no grid point can be fitted.

    Notes
    -----
    Porter & Yu (2015), J. Econometrics 189: the location estimate is the argmax over candidate
    points of the squared standardised local jump.
    """
    dec = tuple(float(v) for v in np.atleast_1d(declared))
    r = bandwidth / 2 if reach is None else float(reach)
    lo, hi = min(dec) - r, max(dec) + r
    st = stats.pooled()
    pts = grid(st, lo, hi)
    best, nan = None, float("nan")
    for c in pts:
        f = fit_jump(st, column, float(c), bandwidth, kernel, degree, right_closed)
        if np.isfinite(f.z) and (best is None or abs(f.z) > abs(best.z)):
            best = f
    if best is None:
        return Location(nan, nan, nan, nan, dec, nan, lo, hi, int(pts.size),
                        "no grid point could be fitted")
    near = min(dec, key=lambda v: abs(v - best.cutoff))
    return Location(best.cutoff, best.jump, best.se, best.z, dec, near, lo, hi, int(pts.size))
