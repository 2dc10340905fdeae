"""Local polynomial jumps at many points of one column's bins, computed together.

The placebo check fits a jump at up to 15 points on each side of a candidate, all with the
candidate's bandwidth, kernel and degree.  Fitted one by one (:func:`scanner.estimate.local.fit_jump`)
each fit is some thirty small numpy calls; here the windows, kernel weights, weighted moment
matrices and their solves of all points are formed as arrays with one row per point, so the cost
grows with the bins, not with the calls.

Each point's numbers are those :func:`~scanner.estimate.local.fit_jump` gives for it (the same
local polynomial WLS on bins, HC1 sandwich variance, the same support checks and SE floor), up to
the order of floating-point additions; a test compares every field against the one-by-one fits
and against row-level statsmodels WLS.

Notes
-----
Hahn, Todd & van der Klaauw (2001) local polynomial jump; sandwich variance White (1980) with
HC1 scaling, as :func:`scanner.estimate.local.fit_jumps`.
"""
from __future__ import annotations

import numpy as np

from .kernels import kernel as kernel_fn
from .local import _rss, se_floor


def jumps_at(u: np.ndarray, n: np.ndarray, s1: np.ndarray, s2: np.ndarray, points,
             h: float, kernel: str = "triangular", degree: int = 1,
             min_bins: int = 4) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Jump, SE and z at each point ``p`` of ``points`` (in the units of ``u``), bandwidth ``h``.

    Bins with ``u − p ≥ 0`` (up to a rounding error of 1e-9·h, so a point on a support value
    puts that value on the right, as at a real cutoff) form the right side.  A point with fewer
    than ``min_bins`` bins in its window, a side without ``degree + 1`` bins, or a singular fit
    gets NaN; so does the z of a point where both sides are constant (no variation, no test).

    Returns
    -------
    (jump, se, z) arrays, one entry per point.
    """
    p = np.asarray(points, float)
    P, d = p.size, int(degree)
    nan = np.full(P, np.nan)
    if P == 0 or u.size == 0:
        return nan, nan.copy(), nan.copy()
    V = u[None, :] - p[:, None]                          # (P, B) centred at each point
    win = np.abs(V) < h
    K = kernel_fn(kernel)(V / h) * win
    right = V >= -1e-9 * h
    inside = K > 0
    sides = [inside & ~right, inside & right]
    counts = [s.sum(axis=1) for s in sides]
    ok = (win.sum(axis=1) >= min_bins) & (counts[0] >= d + 1) & (counts[1] >= d + 1)
    if not ok.any():
        return nan, nan.copy(), nan.copy()
    V, K, sides = V[ok], K[ok], [s[ok] for s in sides]
    pw = [np.ones_like(V)]
    for _ in range(2 * d):
        pw.append(pw[-1] * V)
    flat = _constant(s1, s2, n, sides[0]) & _constant(s1, s2, n, sides[1])
    est, var = [], []
    for s in sides:
        w = K * s                                         # 0 outside this side's window
        wn = w * n
        A = np.stack([np.stack([(wn * pw[i + j]).sum(axis=1) for j in range(d + 1)], axis=-1)
                      for i in range(d + 1)], axis=-2)
        T = np.stack([(w * s1 * pw[i]).sum(axis=1) for i in range(d + 1)], axis=-1)
        try:
            Ainv = np.linalg.inv(A)
        except np.linalg.LinAlgError:
            return _one_by_one(u, n, s1, s2, p, h, kernel, d, min_bins)
        beta = np.einsum("pij,pj->pi", Ainv, T)
        fitted = sum(beta[:, i:i + 1] * pw[i] for i in range(d + 1))
        rss = _rss(n[None, :], s1[None, :], s2[None, :], fitted)
        wr = w * w * rss
        meat = np.stack([np.stack([(wr * pw[i + j]).sum(axis=1) for j in range(d + 1)], axis=-1)
                         for i in range(d + 1)], axis=-2)
        var.append(np.einsum("pi,pij,pj->p", Ainv[:, 0, :], meat, Ainv[:, 0, :]))
        est.append(beta[:, 0])
    n_h = ((sides[0] | sides[1]) * n[None, :]).sum(axis=1)
    dof = 2 * (d + 1)
    scale = np.where(n_h > dof, n_h / np.maximum(n_h - dof, 1e-300), np.nan)
    jump = est[1] - est[0]
    se = np.sqrt((var[0] + var[1]) * scale)
    floor = np.array([se_floor(a, b) for a, b in zip(est[0], est[1])])
    # no standard error (too few rows for HC1): no estimate either, as fit_jumps says
    jump = np.where(np.isfinite(se), jump, np.nan)
    se = np.maximum(se, floor)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(se > 0, jump / se, np.where(jump != 0, np.copysign(np.inf, jump), np.nan))
    z = np.where(np.isfinite(jump) & ~flat, z, np.nan)
    out = [nan.copy(), nan.copy(), nan.copy()]
    for o, v in zip(out, (jump, se, z)):
        o[ok] = v
    return tuple(out)


def _constant(s1, s2, n, mask) -> np.ndarray:
    """Per row of ``mask`` (points × bins): every row of the masked bins has the same value
    (no spread within a bin and one bin mean).  Where both sides are constant — uptake exactly 0
    or 1 on both sides of a placebo point — there is no variation and so no test: a z of 0
    there would count as a placebo that found nothing."""
    mean = s1 / n
    spread = np.maximum(s2 - s1 * mean, 0.0) > 1e-12 * np.maximum(np.abs(s2), 1.0)
    hi = np.where(mask, mean[None, :], -np.inf).max(axis=1)
    lo = np.where(mask, mean[None, :], np.inf).min(axis=1)
    return ~(mask & spread[None, :]).any(axis=1) & (hi - lo <= 1e-12 * np.maximum(np.abs(hi), 1.0))


def _one_by_one(u, n, s1, s2, p, h, kernel, degree, min_bins):
    """The same numbers from one fit per point (used when some point's fit is singular)."""
    from .local import SideData, fit_jumps
    out = np.full((3, p.size), np.nan)
    for i, pt in enumerate(p):
        v = u - pt
        win = np.abs(v) < h
        if win.sum() < min_bins:
            continue
        vw = v[win]
        right = vw >= -1e-9 * h
        f = fit_jumps(SideData(vw, n[win], s1[win], s2[win], right), pt, h, kernel, degree)[0]
        masks = np.stack([~right, right])
        both = _constant(s1[win], s2[win], n[win], masks).all()
        out[:, i] = f.jump, f.se, (np.nan if both else f.z)
    return out[0], out[1], out[2]
