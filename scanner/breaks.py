"""Breaks in one running variable × treatment: where each one is, and a sequential search for more.

Each step of the search (Bai & Perron 1998, *Econometrica* 66(1): find the strongest break,
model it, search again):

1. **Test.** sup_g |t_g| over the grid with its multiplier critical value
   (:func:`scanner.discover.null_sup`; Porter & Yu 2015).  Every step's test is recorded, so
   the q-value family counts each one.  The t's use a variance that cannot collapse where uptake
   is constant on one side (:func:`scanner.discover.scan_grid`).
2. **Where.** Among the grid points that pass the critical value, the one with the largest
   |jump| (Porter & Yu 2015's location estimate, the argmax of the squared jump, restricted to
   where a break is significant so thin tails cannot win on noise).  The location is then
   refined by the least-squares one-break fit on the rows within h of that point, and its
   likelihood-ratio set comes from the same fit (Hansen 2000; :func:`scanner.locate.profile_break`).
   Why not argmax |t|: a window that straddles the real break with one constant side divides a
   biased jump by a tiny SE, so |t| peaks in the wrong place with the wrong sign.
3. **Model it.** The break becomes a wall: no later window reaches across it, and grid points on
   it are not estimable.  The jumps and their null covariance are recomputed with the walls, so
   the next sup-|t| test is the test for one more break given those found.  This replaces a
   blanket exclusion zone around each break, which hid real breaks next to a false one.

The search stops at the first step whose test does not reject, or after ``MAX_BREAKS`` breaks.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
from scipy import stats as sps

from .bins import BinnedStats
from .discover import DRAWS, MAX_GRID, GridScan, NullSup, null_sup, scan_grid
from .locate import METHOD, lr_critical, profile_break

MAX_BREAKS = 3            # breaks kept per running variable × treatment


@dataclass(frozen=True)
class Peak:
    """A break found by the search: location, its set, the one-fit jump and the step's test.

    ``t`` is the step's sup |t| (the search statistic); ``jump``/``se`` come from the one-break
    fit at ``location``.  ``ci_low_open``: the set is (ci_low, ci_high] (a gap of an exact
    support).  ``grid_location`` is the grid point the refinement started from.
    """

    location: float
    ci_low: float
    ci_high: float
    jump: float
    se: float
    t: float
    search_p: float
    critical: float
    bandwidth: float
    n_grid_points: int
    grid_kind: str
    n_rows: int
    resolution: float = 0.0          # median grid spacing
    ci_low_open: bool = False
    split_low: float = float("nan")
    split_high: float = float("nan")
    step: int = 1
    grid_location: float = float("nan")
    locator: str = METHOD
    # The step's simulated null of sup |t| (not written out): a discovered break estimated on
    # the same rows is tested against it at its own |t|, so its p and interval agree.
    null: NullSup | None = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__ if k != "null"}


def location_set(scan: GridScan, i: int, alpha: float) -> tuple[float, float]:
    """Connected grid set around peak ``i`` with t²(peak) − t²(g) ≤ c_α and the same sign.

    A fallback only, where the one-break fit cannot be made (fewer than two values per side).
    """
    t2 = np.where(scan.valid, scan.t ** 2, -np.inf)
    with np.errstate(invalid="ignore"):
        close = (t2[i] - t2 <= lr_critical(alpha)) | (np.isinf(t2[i]) & np.isinf(t2))
        inside = close & (np.sign(scan.t) == np.sign(scan.t[i]))
    a = b = i
    while a > 0 and inside[a - 1]:
        a -= 1
    while b < scan.grid.size - 1 and inside[b + 1]:
        b += 1
    return float(scan.grid[a]), float(scan.grid[b])


def strongest(scan: GridScan, crit: float) -> int:
    """Grid index of the largest |jump| among the points whose |t| passes ``crit``."""
    t = np.where(scan.valid, np.abs(scan.t), -1.0)
    cut = min(crit, float(t.max())) if np.isfinite(crit) else float(t.max())
    pick = t >= cut
    return int(np.flatnonzero(pick)[np.argmax(np.abs(scan.jump[pick]))])


def place(stats: BinnedStats, scan: GridScan, i: int, walls, alpha: float, min_rows: int,
          null: NullSup, step: int, sup: float, p: float) -> Peak:
    """Refine grid point ``i`` by the one-break fit within h of it, between the walls."""
    g0, h = float(scan.grid[i]), scan.bandwidth
    wl = max([w for w in walls if w < g0], default=-np.inf)
    wr = min([w for w in walls if w > g0], default=np.inf)
    lo, hi = max(g0 - h / 2, wl), min(g0 + h / 2, np.nextafter(wr, -np.inf))
    br = profile_break(stats, scan.column, lo, hi, g0 - h, g0 + h, alpha, True, min_rows, walls)
    spacing = float(np.median(np.diff(scan.grid))) if scan.grid.size > 1 else 0.0
    crit = null.critical(alpha)
    common = (p, crit, h, null.n_points, scan.kind, scan.n_rows, spacing)
    if np.isfinite(br.location):
        return Peak(br.location, br.ci_low, br.ci_high, br.jump, br.se, sup, *common,
                    br.ci_low_open, br.split_low, br.split_high, step, g0, null=null)
    lo, hi = location_set(scan, i, alpha)
    return Peak(g0, lo, hi, float(scan.jump[i]), float(scan.se_t[i]), sup, *common,
                step=step, grid_location=g0, locator="grid point with the largest jump", null=null)


@dataclass
class PairSearch:
    """The discovery search of one running variable × treatment.

    ``tests`` holds every sup-|t| test run, one per step, in order; the first ``len(peaks)``
    produced the peaks, a last one that did not reject ends the search.
    """

    running: str
    treatment: str
    bandwidth: float
    n_grid_points: int
    sup_t: float
    search_p: float
    critical: float
    peaks: list
    tests: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"running": self.running, "treatment": self.treatment, "bandwidth": self.bandwidth,
                "n_grid_points": self.n_grid_points, "sup_t": self.sup_t,
                "search_p": self.search_p, "critical": self.critical,
                "locations": [p.location for p in self.peaks], "steps": self.tests}


def search_pair(stats: BinnedStats, treatment: str, alpha: float = 0.05, kernel: str = "triangular",
                min_rows: int = 50, seed: int = 0, draws: int = DRAWS,
                max_grid: int = MAX_GRID, screen: bool = False,
                max_breaks: int = MAX_BREAKS) -> PairSearch:
    """Sequential search for breaks in one running variable × treatment (module docstring).

    ``screen`` (simulation studies only) skips the multiplier simulation when even the
    exact sup-|t| p-value over a subset of mutually independent grid points (windows 2h apart,
    Šidák) is at least alpha; that p-value is a lower bound of the search-adjusted one, so the
    decision is unchanged and the q-values can only get smaller (conservative for a false
    discovery rate measured with it).
    """
    sc0 = scan_grid(stats, treatment, kernel=kernel, min_rows=min_rows, max_grid=max_grid)
    sc, walls, peaks, tests = sc0, [], [], []
    first = None
    for step in range(1, max_breaks + 1):
        valid = sc.valid
        if not valid.any():
            break
        sup = float(np.abs(sc.t[valid]).max())               # may be inf
        if screen and step == 1:
            p_low = _independent_p(sc, sup)
            if p_low >= alpha:
                tests.append({"step": 1, "sup_t": sup, "search_p": p_low, "critical": None,
                              "n_grid_points": int(valid.sum())})
                first = (int(valid.sum()), sup, p_low, float("nan"))
                break
        null = null_sup(sc, draws, seed + 7919 * (step - 1))
        p = null.p_value(sup)
        tests.append({"step": step, "sup_t": sup, "search_p": p, "critical": null.critical(alpha),
                      "n_grid_points": null.n_points})
        if first is None:
            first = (null.n_points, sup, p, null.critical(alpha))
        if not p < alpha:
            break
        pk = place(stats, sc, strongest(sc, null.critical(alpha)), walls, alpha, min_rows, null,
                   step, sup, p)
        peaks.append(pk)
        walls = sorted(walls + [pk.location])
        if step < max_breaks:
            sc = scan_grid(stats, treatment, grid=sc0.grid, bandwidth=sc0.bandwidth, kernel=kernel,
                           min_rows=min_rows, walls=walls)
            sc = replace(sc, kind=sc0.kind)
    n, sup, p, crit = first or (0, float("nan"), float("nan"), float("nan"))
    return PairSearch(stats.running, treatment, sc0.bandwidth, n, sup, p, crit, peaks, tests)


def _independent_p(scan: GridScan, sup: float) -> float:
    """P(max |Z| ≥ sup) over k independent points, k = grid points spaced more than 2h apart."""
    g = scan.grid[scan.valid]
    k, last = 0, -np.inf
    for c in g:
        if c - last >= 2 * scan.bandwidth:
            k, last = k + 1, c
    if not np.isfinite(sup):
        return 0.0
    return float(1 - (1 - 2 * sps.norm.sf(sup)) ** max(k, 1))


def near_candidate(peak: Peak, cutoffs: list[float], origins: list[str] | None = None) -> int | None:
    """Index of the declared/round cutoff a peak belongs to, or None.

    A round cutoff belongs to the peak when it lies in the location set (widened by one grid
    spacing, the search's resolution; a half-open lattice gap counts whole).  A declared cutoff
    also belongs to it when it is within half the pilot bandwidth of that set: a rule's value is
    a specific claim, and "care follows a value near the declared one" is the finding to report
    on it.  The nearest wins.
    """
    if not cutoffs:
        return None
    origins = origins or ["round"] * len(cutoffs)
    best, dist = None, np.inf
    gap = peak.ci_low_open               # the set is a lattice gap: exact, not widened
    for i, (c, o) in enumerate(zip(cutoffs, origins)):
        reach = (0.0 if gap else peak.resolution) + (peak.bandwidth / 2 if o == "declared" else 0.0)
        above = c > peak.ci_low - reach if gap else c >= peak.ci_low - reach
        if above and c <= peak.ci_high + reach and abs(c - peak.location) < dist:
            best, dist = i, abs(c - peak.location)
    return best
