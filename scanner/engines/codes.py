"""Group codes of a batch's bin keys: each row's group (0..nb-1) and each group's key.

The compiled variant gives the same groups and keys with numba loops
(:mod:`scanner.engines.compiled`).
"""
from __future__ import annotations

import numpy as np


def _decimal_codes(x: np.ndarray):
    """Integer codes k with x == k / 10^d exactly for a short decimal support (d ≤ 3), or None.

    Registry values are mostly integers or recorded to a fixed number of decimals; for those,
    dense integer offsets replace hashing the floats (several times faster).
    """
    if x.size == 0 or not np.isfinite(x).all():
        return None
    for d in range(4):
        s = 10.0 ** d
        k = np.rint(x * s)
        if np.abs(k).max() < 2 ** 52 and ((k / s) == x).all():
            return k.astype(np.int64), s
    return None


def _codes(key: np.ndarray, ok: np.ndarray, dense: bool, decimals: bool = True):
    """Group codes 0..nb-1 for rows with ``ok``, nb for the rest; and the key of each group.

    ``decimals`` False skips the short-decimal route (the compiled one has ruled it out)."""
    import pandas as pd
    kk = key[ok]
    if not dense and decimals:
        dec = _decimal_codes(kk)
        if dec is not None and int(dec[0].max()) - int(dec[0].min()) <= 4 * dec[0].size + 1024:
            g, uniq, nb = _codes(dec[0], np.ones(dec[0].size, bool), True)
            out = np.full(key.size, nb, np.int64)
            out[ok] = g
            return out, uniq / dec[1], nb
    if dense and kk.size:
        lo, hi = int(kk.min()), int(kk.max())
        if hi - lo <= 4 * kk.size + 1024:
            used = np.zeros(hi - lo + 1, bool)
            used[kk - lo] = True
            uniq = np.flatnonzero(used) + lo
            lookup = np.cumsum(used) - 1
            codes = lookup[kk - lo]
        else:
            codes, uniq = pd.factorize(kk)
    else:
        codes, uniq = pd.factorize(kk)
    nb = len(uniq)
    g = np.full(key.size, nb, np.int64)
    g[ok] = codes
    return g, np.asarray(uniq), nb


def _codes_compiled(key: np.ndarray, ok: np.ndarray, dense: bool, hint: int = 0,
                    fallback: bool = True, out: np.ndarray | None = None):
    """:func:`_codes` with compiled loops: the same groups and keys; and the number of decimals
    that made the values whole (tried first next time; any that works gives the same keys).
    With ``fallback`` False, (None, hint) where the keys are not short decimals on a dense
    range (the caller decides how to group them).  The compiled codes are int32, written to
    ``out`` when given (the hashed ones are a new int64 array)."""
    from . import compiled
    if out is None:
        out = np.empty(key.size, np.int32)
    if dense:
        g, uniq, nb, fits = compiled.dense_codes(key, ok, out)
        return (g, uniq, nb) if fits else _codes(key, ok, True), hint
    for d in dict.fromkeys((hint, 0, 1, 2, 3)):
        # Every scale is tried (a hint of 3 decimals whose table is too spread out must not
        # hide integers on a dense one); any scale that works gives the same keys.
        g, uniq, nb, status = compiled.decimal_codes(key, ok, 10.0 ** d, out)
        if status == 0:
            return (g, uniq / 10.0 ** d, nb), d
    if not fallback:
        return None, hint
    return _codes(key, ok, False, decimals=False), hint
