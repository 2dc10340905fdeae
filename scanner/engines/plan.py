"""What an engine is asked to compute, and what it hands back."""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

MAX_EXACT = 5000          # at most this many distinct values → exact-support bins
MAX_BINS = 5000           # fixed-width bins: the finest 1-2-5 width with at most this many bins
FINE_KEYS = 20000         # bins held while streaming (exact values, then a power-of-ten grid)
BATCH_ROWS = 1_000_000    # rows per record batch


@dataclass(frozen=True)
class BinPlan:
    """The binning pass to run.

    running : running-variable columns.
    bin_width : per running variable, a fixed bin width chosen by the user (or absent).
    columns : tracked columns (treatments, covariates, outcomes) — the same for every running variable.
    treatments : the subset of ``columns`` that must be 0/1.
    pairs : column pairs that need joint sums (treatment × outcome for fuzzy designs).
    date : date column giving calendar-quarter period keys, or None.
    split_seed : seed of the half-sample key, or None for no split.
    max_exact, max_bins, fine_keys : grid rule, see :mod:`scanner.engines.grid`.
    batch_rows : rows per record batch (memory knob; results do not depend on it).
    kernel : "compiled" (numba loops, the default; "sparse" where numba is missing), "sparse"
        (one scipy product per running variable) or "bincount" (plain numpy): the same sums.
    split_unit : unit-id column; when set, the half is a seeded hash of the unit id (all rows of
        a unit fall in the same half, whatever the row order), else of the row position.
    edges : per running variable, forced edges ``(cutoff, right_closed)`` known before the pass
        (declared rules, converted to the column's unit): a fixed-width bin holding one is split
        there, so no bin straddles a declared cutoff.
    periods : per running variable, the period detail its bins keep when ``date`` is set:
        ``"quarter"`` (the default), ``"year"`` (keys year*4, the year's first quarter) or
        ``"none"``.  Memory and time grow with the bins × periods kept, so a scan asks for
        quarters only where a dated rule needs them.
    round_edges : also split the final grid at the round values the candidate rule can propose
        (where the bins held during the pass allow it exactly).
    """

    running: tuple[str, ...]
    columns: tuple[str, ...]
    treatments: tuple[str, ...] = ()
    pairs: tuple[tuple[str, str], ...] = ()
    bin_width: dict = field(default_factory=dict)
    date: str | None = None
    split_seed: int | None = None
    split_unit: str | None = None
    max_exact: int = MAX_EXACT
    max_bins: int = MAX_BINS
    fine_keys: int = FINE_KEYS
    batch_rows: int = BATCH_ROWS
    kernel: str = "compiled"
    edges: dict = field(default_factory=dict)
    round_edges: bool = False
    periods: dict = field(default_factory=dict)

    def period_of(self, running: str) -> str:
        """Period detail kept for ``running``: "quarter", "year" or "none"."""
        return self.periods.get(running, "quarter") if self.date else "none"

    @property
    def needed(self) -> list[str]:
        cols = list(dict.fromkeys(list(self.running) + list(self.columns)))
        if self.date and any(self.period_of(r) != "none" for r in self.running):
            cols.append(self.date)
        if self.split_seed is not None and self.split_unit and self.split_unit not in cols:
            cols.append(self.split_unit)
        return cols


@dataclass
class BinResult:
    """Output of the pass: BinnedStats per running variable and row accounting."""

    stats: dict
    rows_read: int
    missing: dict            # running variable -> rows with the value missing
    nonfinite: dict          # running variable -> rows with ±inf


def nice_width(span: float, target: int) -> float:
    """Largest 1-2-5 × 10^k number not above span/target (so round cutoffs fall on bin edges)."""
    raw = span / max(target, 1)
    if not np.isfinite(raw) or raw <= 0:
        return 1.0
    exp = math.floor(math.log10(raw))
    for m in (5, 2, 1):
        w = m * 10.0 ** exp
        if w <= raw * (1 + 1e-12):
            return float(w)
    return float(10.0 ** exp)


def weighted_quantile(values: np.ndarray, weights: np.ndarray, q) -> np.ndarray:
    """Quantiles of a weighted support (values sorted or not)."""
    order = np.argsort(values)
    v, w = values[order], weights[order].astype(float)
    cw = np.cumsum(w)
    if cw.size == 0 or cw[-1] <= 0:
        return np.full(np.shape(q), np.nan)
    return v[np.minimum(np.searchsorted(cw, np.asarray(q) * cw[-1], side="left"), v.size - 1)]
