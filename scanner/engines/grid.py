"""Fixed-width bin grids that every engine computes identically, and the rule that settles them.

A grid is a width ``w = p·10^-d`` (``p`` a whole number, ``d`` a whole number of either sign)
with origin 0.  Bin ``k`` is ``edge(k) <= x < edge(k+1)`` where ``edge(k)`` is the double
nearest to the exact decimal ``k·p·10^-d`` — computed as ``(k·p)/10^d`` with both factors exact
doubles, so a cutoff typed as ``6.5`` or ``0.3`` is exactly a bin edge and the rows recorded at
the cutoff never share a bin with rows below it (plain ``floor(x/w)`` puts 0.3 into the bin
[0.2, 0.3) because 0.3/0.1 = 2.9999999999999996).  Because edges are defined by exact decimals,
the edges of a grid ``r`` times coarser are every ``r``-th edge of the finer grid, so regrouping
keys by integer division gives the same bins as keying the rows afresh.

Rule (the end of it in :mod:`scanner.engines.settle`): a running variable keeps exact-support
bins while it has at most ``fine_keys`` distinct values; beyond that its rows go onto the
finest power-of-ten grid on which the table occupies at most ``fine_keys`` bins.  At the end, a variable with at most
``max_exact`` distinct values keeps exact bins; otherwise it gets the finest width of the
1-2-5 series (a multiple of the power-of-ten grid) that occupies at most ``max_bins`` bins,
split next to declared cutoffs at the edges of the bins held during the pass.
Every step depends only on the set of values in the table — not on row order, batch size or
engine — so all engines and all batch sizes produce the same bins.
"""
from __future__ import annotations

import functools
import math

import numpy as np

MAX_DECIMALS = 22          # 10^d is an exact double up to d = 22
SUB = 1024.0               # part j of a bin split at forced edges has key k + j/SUB
KEY_LIMIT = float(2 ** 60)  # bin keys are clipped to ±2^60 (int64 holds their differences)


def grid_of_width(width: float) -> tuple[float, int]:
    """(p, d) with width = p·10^-d, p whole when the width is a short decimal (user widths)."""
    for d in range(0, 13):
        p = width * 10.0 ** d
        if abs(p - round(p)) <= 1e-9 * max(p, 1.0):
            return float(round(p)), d
    return float(width), 0                     # not a short decimal: edges k·width


def width_of(p: float, d: int) -> float:
    return p / 10.0 ** d if d > 0 else p * 10.0 ** (-d)


def edges(k: np.ndarray, p: float, d: int) -> np.ndarray:
    """Left edge of bin ``k`` (k as float64)."""
    if d > 0:
        return (k * p) / 10.0 ** d
    return k * (p * 10.0 ** (-d))


def keys(x: np.ndarray, p: float, d: int) -> np.ndarray:
    """Bin index of each finite ``x`` on the grid (p, d), as int64."""
    w = width_of(p, d)
    k = np.floor(x / w)
    # x/w is correctly rounded, so the first guess is off by at most one bin: fix it against
    # the exact-decimal edges.
    k -= edges(k, p, d) > x
    k += edges(k + 1, p, d) <= x
    # A junk value (1e300) would overflow int64 and land at −9.2e18, on the wrong side of every
    # cutoff: values beyond 2^60 bins share the outermost bin on their own side.
    return np.clip(k, -KEY_LIMIT, KEY_LIMIT).astype(np.int64)


def keys_compiled(x: np.ndarray, ok: np.ndarray, p: float, d: int,
                  out: np.ndarray | None = None) -> np.ndarray:
    """:func:`keys` of the rows with ``ok`` and 0 elsewhere, with one compiled loop
    (:func:`scanner.engines.compiled.grid_keys`; the same keys, tested), written to ``out``
    (int64) when given."""
    from . import compiled
    ten = 10.0 ** d if d > 0 else 0.0
    pw = p * 10.0 ** (-d) if d <= 0 else 0.0
    if out is None:
        out = np.empty(x.size, np.int64)
    return compiled.grid_keys(x, ok, width_of(p, d), float(p), ten, pw, KEY_LIMIT, out)


def power_grid(e: int) -> tuple[float, int]:
    """The grid of width 10^e."""
    return 1.0, -e


def series_grid(m: int, e: int) -> tuple[float, int]:
    """The grid of width m·10^e (m in 1, 2, 5)."""
    return (float(m), -e) if e < 0 else (float(m * 10 ** e), 0)


def occupied(values: np.ndarray, p: float, d: int) -> int:
    return int(np.unique(keys(values, p, d)).size)


def top_level(values: np.ndarray) -> int:
    """A power of ten above which all values fall into at most three bins."""
    big = float(np.max(np.abs(values))) if values.size else 1.0
    return int(math.ceil(math.log10(big))) + 1 if big > 0 else 1


def start_level(values: np.ndarray, fine_keys: int) -> int:
    """First power-of-ten level for a variable whose distinct ``values`` outnumber ``fine_keys``.

    The largest level e at which these values alone occupy more than ``fine_keys`` bins is
    certainly finer than the table's settled level (more rows never occupy fewer bins), so
    e + 1 never overshoots it; coarsening from there stops exactly at the settled level.
    """
    e = top_level(values)
    while e > -MAX_DECIMALS and occupied(values, *power_grid(e)) <= fine_keys:
        e -= 1
    return e + 1


def final_grid(values_or_keys: np.ndarray, level: int | None, max_bins: int) -> tuple[int, int]:
    """(m, e): the finest 1-2-5 width occupying at most ``max_bins`` bins.

    ``level is None``: ``values_or_keys`` are exact values and any width may be chosen.
    Otherwise they are keys on the 10^level grid and only multiples of it are considered.
    """
    if level is None:
        # Scan from coarse to fine; stop at the first width that holds too many bins.
        e = top_level(values_or_keys)
        best = (5, e)
        while e > -MAX_DECIMALS:
            for m in (5, 2, 1):
                if occupied(values_or_keys, *series_grid(m, e)) > max_bins:
                    return best
                best = (m, e)
            e -= 1
        return best
    e = level
    while True:
        for m in (1, 2, 5):
            r = m * 10 ** (e - level)
            if np.unique(np.floor_divide(values_or_keys.astype(np.int64), r)).size <= max_bins:
                return m, e
        e += 1


# ---------------------------------------------------------------------- forced edges
def inner(forced, p: float, d: int, name: str = ""):
    """Forced edges lying inside a bin of the grid (p, d), sorted by value.

    ``forced`` holds pairs ``(value, right_closed)``.  An edge is inside bin k when
    ``edge(k) < value``; a left-closed edge on a bin's lower edge also counts, since rows at the
    value belong below it.  Returns arrays (bin k, value, right_closed), read-only (a settled
    grid's edges are looked up for every fit, so the answer is cached per tuple of edges).
    ``name`` (the running variable) is quoted if a bin holds too many edges to split.
    """
    if not forced:
        return np.zeros(0, np.int64), np.zeros(0), np.zeros(0, bool)
    if isinstance(forced, tuple):
        return _inner_cached(forced, float(p), int(d), name)
    return _inner(forced, p, d, name)


@functools.lru_cache(maxsize=64)
def _inner_cached(forced: tuple, p: float, d: int, name: str):
    out = _inner(forced, p, d, name)
    for a in out:
        a.flags.writeable = False
    return out


def _inner(forced, p: float, d: int, name: str = ""):
    pairs = np.array([(float(v), bool(rc)) for v, rc in forced], float).reshape(-1, 2)
    v, rc = pairs[:, 0], pairs[:, 1] > 0
    order = np.lexsort((rc, v))                 # by value, left-closed first (as sorted tuples)
    v, rc = v[order], rc[order]
    new = np.ones(v.size, bool)
    new[1:] = (v[1:] != v[:-1]) | (rc[1:] != rc[:-1])
    v, rc = v[new], rc[new]
    k = keys(v, p, d)
    lo = edges(k.astype(float), p, d)
    keep = (lo < v) | ((lo == v) & ~rc)
    k, v, rc = k[keep], v[keep], rc[keep]
    _check_parts(k, p, d, name)
    return k, v, rc


def _check_parts(k: np.ndarray, p: float, d: int, name: str) -> None:
    """Refuse a bin split into more than ``SUB`` parts: part j's key ``k + j/SUB`` would reach
    the next bin's keys and mix its rows with another bin's, silently."""
    if k.size < SUB:
        return
    u, count = np.unique(k, return_counts=True)
    worst = int(np.argmax(count))
    if count[worst] < SUB:
        return
    from ..errors import CrowdedBin
    lo, hi = edges(np.array([u[worst], u[worst] + 1], float), p, d)
    raise CrowdedBin(
        f"{count[worst]:,} cutoffs (declared, or added around declared ones) fall inside one bin "
        f"of the binning grid, [{lo:g}, {hi:g}); at most {int(SUB) - 1:,} can. Declare fewer "
        f"cutoffs on {f'running variable {name!r}' if name else 'this running variable'}: "
        "cutoffs this close together cannot be told apart at this data's resolution.",
        name, float(lo), float(hi))


def _blocks(kk: np.ndarray, k: np.ndarray):
    """First and one-past-last position in ``kk`` (sorted) of the inner edges of each bin ``k``."""
    return np.searchsorted(kk, k, "left"), np.searchsorted(kk, k, "right")


def sub_index(k: np.ndarray, x: np.ndarray, inn) -> np.ndarray | None:
    """Part of its bin each x falls in: the number of inner edges of bin k it lies above.

    ``inn`` is :func:`inner`; None when no bin is split.  "Above" is x >= e for a right-closed
    edge and x > e for a left-closed one.  Inner edges sorted by value have non-decreasing bins,
    so the edges of bin k are one block of the sorted list and the count is two binary searches
    per closure kind (clipped to the block), whatever the number of edges.
    """
    kk, v, rc = inn
    if kk.size == 0:
        return None
    k = np.asarray(k, np.int64)
    x = np.asarray(x, float)
    j = np.zeros(k.shape, np.int64)
    for closed, side in ((True, "right"), (False, "left")):
        sel = rc == closed
        if not sel.any():
            continue
        kb, vb = kk[sel], v[sel]
        s, e = _blocks(kb, k)
        j += np.clip(np.searchsorted(vb, x, side), s, e) - s
    return j


def part_bounds(k: np.ndarray, j: np.ndarray, inn, lo: np.ndarray, hi: np.ndarray) -> None:
    """Set ``lo``/``hi`` of part ``j`` of bin ``k`` to the inner edges that bound it (in place).

    Part j (j ≥ 1) starts at the bin's j-th inner edge, and part j ends at its (j+1)-th.
    """
    kk, v, _ = inn
    if kk.size == 0:
        return
    s, e = _blocks(kk, np.asarray(k, np.int64))
    j = np.asarray(j, np.int64)
    has_lo = (j >= 1) & (j <= e - s)
    lo[has_lo] = v[(s + j - 1)[has_lo]]
    has_hi = (j >= 0) & (j < e - s)
    hi[has_hi] = v[(s + j)[has_hi]]
