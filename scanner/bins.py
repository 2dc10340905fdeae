"""BinnedStats: the sufficient sums that every estimator in cutscan works from.

For one running variable the rows are grouped into bins.  A bin is either one exact support
value of the running variable (``kind == "exact"``) or a fixed-width interval
``[origin + k*width, origin + (k+1)*width)`` (``kind == "width"``).  Bins may additionally be keyed
by a calendar period code and by a seeded half-sample indicator.

Per bin we keep the row count ``n`` and the exact first moments ``sx = Σx`` and ``sxx = Σx²``; for
every tracked column ``j`` (treatments, covariates, outcomes) the count of rows where it is
present ``cnt[:, j]``, ``s1[:, j] = Σy`` and ``s2[:, j] = Σy²``; and for selected column pairs
``(a, b)`` the joint sums over rows where both are present: ``pn``, ``pa = Σa``, ``pb = Σb``,
``paa``, ``pbb`` and ``pab = Σab``.  With exact-support bins every local polynomial fit, its
sandwich variance and every density estimate computed from these sums equals the row-level
computation to floating-point precision.

Forced edges.  A fixed-width bin that contains a cutoff would send all its rows to one side of
it.  Cutoffs known before the pass (declared rules, also after a unit conversion) and round
cutoffs are therefore *forced edges* (``edges``, pairs ``(value, right_closed)``): a bin that
holds one is split there, rows ``x >= value`` (``x > value`` for a left-closed rule) going to the
upper part.  The key of the ``j``-th part of grid bin ``k`` is ``k + j/SUB``, so keys still sort
in the order of x; :meth:`BinnedStats.bounds` gives every bin's interval.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from .engines import grid

_PAIR_FIELDS = ("pn", "pa", "pb", "paa", "pbb", "pab")


@dataclass(frozen=True)
class BinnedStats:
    """Per-bin sufficient statistics for one running variable.

    Attributes
    ----------
    running : name of the running variable.
    columns : names of the tracked columns (order of the second axis of ``cnt``, ``s1``, ``s2``).
    kind : ``"exact"`` (one bin per distinct value) or ``"width"`` (fixed-width bins).
    width, origin : bin grid for ``kind == "width"`` (NaN for exact bins).
    key : bin key, the exact value or the integer bin index (as float64).
    period, half : extra keys (-1 when unused).
    n, sx, sxx : row count, Σx and Σx² per bin.
    cnt, s1, s2 : per bin and column, count of present values, Σy and Σy².
    pairs : column pairs with joint sums, as (name_a, name_b).
    pn, pa, pb, paa, pbb, pab : joint sums per bin and pair.
    edges : forced edges ``(value, right_closed)`` at which fixed-width bins are split.
    """

    running: str
    columns: tuple[str, ...]
    kind: str
    width: float
    origin: float
    key: np.ndarray
    period: np.ndarray
    half: np.ndarray
    n: np.ndarray
    sx: np.ndarray
    sxx: np.ndarray
    cnt: np.ndarray
    s1: np.ndarray
    s2: np.ndarray
    pairs: tuple[tuple[str, str], ...] = ()
    pn: np.ndarray = field(default=None)
    pa: np.ndarray = field(default=None)
    pb: np.ndarray = field(default=None)
    paa: np.ndarray = field(default=None)
    pbb: np.ndarray = field(default=None)
    pab: np.ndarray = field(default=None)
    edges: tuple = ()

    # ------------------------------------------------------------------ construction
    @classmethod
    def empty(cls, running: str, columns, pairs=(), kind: str = "exact",
              width: float = float("nan"), origin: float = float("nan"),
              edges=()) -> "BinnedStats":
        k, p = len(columns), len(pairs)
        z1 = np.zeros(0)
        return cls(running, tuple(columns), kind, width, origin, z1, np.zeros(0, np.int32),
                   np.zeros(0, np.int8), np.zeros(0, np.int64), z1, z1,
                   np.zeros((0, k), np.int64), np.zeros((0, k)), np.zeros((0, k)),
                   tuple(tuple(x) for x in pairs),
                   *[np.zeros((0, p), np.int64 if f == "pn" else float) for f in _PAIR_FIELDS],
                   edges=tuple(edges))

    def __post_init__(self):
        if self.pn is None:
            p = len(self.pairs)
            b = len(self.key)
            for f in _PAIR_FIELDS:
                object.__setattr__(self, f, np.zeros((b, p), np.int64 if f == "pn" else float))

    @property
    def n_bins(self) -> int:
        return len(self.key)

    @property
    def x(self) -> np.ndarray:
        """Representative running-variable value of each bin.

        The exact value for exact-support bins (so cutoff comparisons are exact), the in-bin
        mean Σx/n for fixed-width bins.
        """
        if self.kind == "exact":
            return self.key
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.n > 0, self.sx / np.maximum(self.n, 1), np.nan)

    @property
    def total(self) -> int:
        return int(self.n.sum())

    def col(self, name: str) -> int:
        try:
            return self.columns.index(name)
        except ValueError:
            raise KeyError(f"column '{name}' is not tracked for running variable "
                           f"'{self.running}'; tracked: {', '.join(self.columns)}") from None

    def pair(self, a: str, b: str) -> int:
        try:
            return self.pairs.index((a, b))
        except ValueError:
            raise KeyError(f"pair ({a}, {b}) has no joint sums for '{self.running}'") from None

    # ------------------------------------------------------------------ algebra
    def _arrays(self):
        return {f: getattr(self, f) for f in
                ("n", "sx", "sxx", "cnt", "s1", "s2") + _PAIR_FIELDS}

    def _grouped(self, key, period, half, arrays) -> "BinnedStats":
        """Sum ``arrays`` over identical (key, period, half) and return sorted bins."""
        if len(key) == 0:
            return replace(self, key=key, period=period, half=half, **arrays)
        order = np.lexsort((half, period, key))
        key, period, half = key[order], period[order], half[order]
        new = np.ones(len(key), bool)
        new[1:] = (key[1:] != key[:-1]) | (period[1:] != period[:-1]) | (half[1:] != half[:-1])
        starts = np.flatnonzero(new)
        out = {name: np.add.reduceat(np.take(a, order, axis=0), starts, axis=0) if a.shape[0]
               else a for name, a in arrays.items()}
        return replace(self, key=key[starts], period=period[starts], half=half[starts], **out)

    def _same_layout(self, other: "BinnedStats") -> None:
        if (self.running, self.columns, self.pairs, self.kind) != \
                (other.running, other.columns, other.pairs, other.kind):
            raise ValueError("cannot merge BinnedStats with different running variable, "
                             "columns, pairs or bin kind")
        if self.kind == "width" and not (self.width == other.width and self.origin == other.origin
                                         and self.edges == other.edges):
            raise ValueError("cannot merge fixed-width bins on different grids")

    def merge(self, other: "BinnedStats") -> "BinnedStats":
        """Add two BinnedStats (batches or partitions of the same table); associative."""
        self._same_layout(other)
        a, b = self._arrays(), other._arrays()
        arrays = {k: np.concatenate([a[k], b[k]], axis=0) for k in a}
        return self._grouped(np.concatenate([self.key, other.key]),
                             np.concatenate([self.period, other.period]),
                             np.concatenate([self.half, other.half]), arrays)

    def collapse(self, period: bool = True, half: bool = True) -> "BinnedStats":
        """Sum over the period and/or half keys, leaving one bin per running-variable key."""
        p = np.full_like(self.period, -1) if period else self.period
        h = np.full_like(self.half, -1) if half else self.half
        return self._grouped(self.key, p, h, self._arrays())

    @property
    def keyed(self) -> bool:
        """True when bins carry period or half keys."""
        return bool((self.period >= 0).any() or (self.half >= 0).any())

    def pooled(self) -> "BinnedStats":
        """One bin per running-variable key (self when there are no period/half keys)."""
        return self.collapse() if self.keyed else self

    def restrict(self, mask=None, period=None, half=None) -> "BinnedStats":
        """Keep bins selected by a boolean mask and/or a period code (or codes) and/or a half."""
        keep = np.ones(self.n_bins, bool) if mask is None else np.asarray(mask, bool)
        if period is not None:
            keep = keep & np.isin(self.period, np.atleast_1d(period))
        if half is not None:
            keep = keep & (self.half == half)
        arrays = {k: v[keep] for k, v in self._arrays().items()}
        return replace(self, key=self.key[keep], period=self.period[keep],
                       half=self.half[keep], **arrays)

    def to_width(self, width: float, origin: float = 0.0) -> "BinnedStats":
        """Re-bin exact-support bins onto a fixed-width grid; the sums stay exact."""
        if self.kind != "exact":
            raise ValueError("only exact-support bins can be re-binned")
        key = np.floor((self.key - origin) / width)
        base = replace(self, kind="width", width=float(width), origin=float(origin))
        return base._grouped(key, self.period, self.half, self._arrays())

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """(lo, hi) of every bin: rows lie in [lo, hi) (lo == hi == key for exact bins).

        The upper part of a bin split at a left-closed forced edge ``e`` holds x > e; its lo is e.
        """
        if self.kind == "exact":
            return self.key.copy(), self.key.copy()
        p, d = grid.grid_of_width(self.width)
        k = np.floor(self.key)
        j = np.rint((self.key - k) * grid.SUB).astype(np.int64)
        lo = grid.edges(k, p, d) + self.origin
        hi = grid.edges(k + 1, p, d) + self.origin
        grid.part_bounds(k.astype(np.int64), j, grid.inner(self.edges, p, d), lo, hi)
        return lo, hi

    def straddles(self, cutoff: float, right_closed: bool = True) -> bool:
        """True when an occupied bin holds rows on both sides of ``cutoff``."""
        if self.kind == "exact":
            return False
        st = self.pooled()
        lo, hi = st.bounds()
        occ = st.n > 0
        # A cutoff within rounding of a bin edge is that edge (a grid point computed as
        # origin + k·width can differ from the exact decimal edge in the last bits).
        tol = 1e-9 * max(self.width, abs(cutoff) * 1e-7)
        if ((lo < cutoff - tol) & (cutoff + tol < hi) & occ).any():
            return True
        # A left-closed cutoff on a bin's lower edge: rows at the cutoff share the bin with rows
        # above it, unless the cutoff was a forced (left-closed) edge.
        if not right_closed and (cutoff, False) not in self.edges:
            return bool(((lo == cutoff) & (hi > cutoff) & occ).any())
        return False

    def validate(self) -> "BinnedStats":
        """Check shapes and invariants; return self so it can be chained."""
        b, k, p = self.n_bins, len(self.columns), len(self.pairs)
        for f in ("period", "half", "n", "sx", "sxx"):
            if getattr(self, f).shape != (b,):
                raise ValueError(f"BinnedStats.{f} has shape {getattr(self, f).shape}, expected ({b},)")
        for f in ("cnt", "s1", "s2"):
            if getattr(self, f).shape != (b, k):
                raise ValueError(f"BinnedStats.{f} has the wrong shape")
        for f in _PAIR_FIELDS:
            if getattr(self, f).shape != (b, p):
                raise ValueError(f"BinnedStats.{f} has the wrong shape")
        if (self.n < 0).any() or (self.cnt > self.n[:, None]).any():
            raise ValueError("BinnedStats counts are inconsistent")
        if self.kind not in ("exact", "width"):
            raise ValueError(f"unknown bin kind {self.kind!r}")
        return self

    # ------------------------------------------------------------------ convenience
    def column_sums(self, name: str):
        """(x, n, Σy, Σy²) per bin for one tracked column, over rows where it is present."""
        j = self.col(name)
        return self.x, self.cnt[:, j].astype(float), self.s1[:, j], self.s2[:, j]

    def support_counts(self, drop=None, lengths: bool = False):
        """Sorted (x, n) over occupied pooled bins; ``drop`` masks pooled bins to leave out.
        With ``lengths`` also each bin's length (1 for exact support points)."""
        st = self.pooled()
        keep = st.n > 0
        if drop is not None:
            keep = keep & ~np.asarray(drop, bool)
        x, n = st.x[keep], st.n[keep].astype(float)
        order = np.argsort(x, kind="stable")
        if not lengths:
            return x[order], n[order]
        if st.kind == "width":
            lo, hi = st.bounds()
            length = (hi - lo)[keep][order]
        else:
            length = np.ones(order.size)
        return x[order], n[order], length

    def distinct_values(self) -> int:
        return int(np.unique(self.key[self.n > 0]).size)
