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
    flat = _constant(s1, s2, n, sides[0]) & _constant(s1, s2, n, sides[1])
    try:
        est, _, var = side_fits(V, K, sides, n, s1[:, None], s2[:, None], d)
    except np.linalg.LinAlgError:
        return _one_by_one(u, n, s1, s2, p, h, kernel, d, min_bins)
    est, var = est[..., 0], var[..., 0]
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


def side_fits(V, K, sides, n, S1, S2, degree: int):
    """Local polynomial fits of every column on each side of many points at once.

    ``V`` (points × bins): bin positions centred at each point; ``K``: kernel weights (0 outside
    the window); ``sides``: (left, right) masks of the same shape; ``n`` (bins): rows per bin;
    ``S1``/``S2`` (bins × columns): Σy and Σy² per bin of columns present on the same rows.
    ``n``, ``S1`` and ``S2`` may also hold each point's own bins (a leading points axis), when
    ``V`` holds for each point only the bins near it.
    Returns (intercept, slope, intercept variance), each shaped (2 sides, points, columns); the
    slope is 0 for degree 0.  The same weighted least squares as
    :func:`scanner.estimate.local.fit_jumps` (moment matrix R'WR per side and point, its
    inverse shared by the columns, HC0 sandwich of the intercept before the HC1 scale), with
    the sums over bins as array reductions.  Raises ``numpy.linalg.LinAlgError`` if any
    point's moment matrix is singular (the caller then fits one by one).
    """
    d = int(degree)
    nn = n if n.ndim == 2 else n[None, :]
    T1, T2 = (S1, S2) if S1.ndim == 3 else (S1[None], S2[None])
    # Bins outside a point's window carry weight 0 but still enter the arrays: a junk score
    # (1e300) there would make V² infinite and 0·inf NaN, so their positions are set to 0.
    V = np.where(K > 0, V, 0.0)
    R = [np.ones_like(V)]
    for _ in range(2 * d):
        R.append(R[-1] * V)                     # powers V^0 … V^2d
    est, slope, var = [], [], []
    for side in sides:
        w = K * side                                      # 0 outside this side's window
        wn = w * nn
        A = np.stack([np.stack([(wn * R[i + j]).sum(axis=1) for j in range(d + 1)], axis=-1)
                      for i in range(d + 1)], axis=-2)
        Ainv = np.linalg.inv(A)                           # (points, d+1, d+1)
        T = np.stack([w * R[i] for i in range(d + 1)], axis=1) @ S1    # (points, d+1, cols)
        beta = Ainv @ T                                   # (points, d+1, cols)
        fitted = sum(beta[:, i, None, :] * R[i][:, :, None] for i in range(d + 1))
        rss = _rss(nn[:, :, None], T1, T2, fitted)                     # (points, bins, cols)
        wr = (w * w)[:, :, None] * rss
        meat = np.stack([np.stack([np.einsum("pb,pbc->pc", R[i + j], wr) for j in range(d + 1)],
                                  axis=1) for i in range(d + 1)], axis=1)  # (points, i, j, cols)
        a0 = Ainv[:, 0, :]                                # first row of A⁻¹
        var.append(np.einsum("pi,pijc,pj->pc", a0, meat, a0))
        est.append(beta[:, 0, :])
        slope.append(beta[:, 1, :] if d >= 1 else np.zeros_like(beta[:, 0, :]))
    return np.stack(est), np.stack(slope), np.stack(var)


CHUNK_CELLS = 2_000_000   # entries of one points × bins × columns array (our choice: 16 MB)


def fits_at(stats, columns, cutoffs, bandwidths, right_closed, kernel: str = "triangular",
            degree: int = 1) -> list[list]:
    """:func:`scanner.estimate.local.fit_jump` of each column at each (cutoff, bandwidth),
    computed together: one list of JumpFit (one per column) per point.

    The candidates of one running variable share its bins; their windows, kernel weights,
    moment matrices and solves are formed as arrays with one row per candidate, and columns
    present on the same rows (equal counts in every bin) share them as well.  Each number is
    the one ``fit_jump`` gives for that column and point up to the order of floating-point
    additions (a test compares every field, and against row-level statsmodels WLS); support
    checks, reasons, the HC1 scale and the SE floor are those of ``fit_jump``.
    """
    from .local import _check_support, _finish, _not_estimable, side_data_many
    st = stats.pooled()
    c = np.asarray(cutoffs, float)
    h = np.asarray(bandwidths, float)
    rc = np.broadcast_to(np.asarray(right_closed, bool), c.shape)
    P, d = c.size, int(degree)
    # Arrays of points × bins × columns: at most CHUNK_CELLS entries at a time (a window may
    # reach every bin), so memory stays bounded however many candidates a variable has.
    step = max(1, CHUNK_CELLS // max(st.n_bins * max(len(columns), 1), 1))
    if P > step:
        return [row for a in range(0, P, step)
                for row in fits_at(st, columns, c[a:a + step], h[a:a + step], rc[a:a + step],
                                   kernel, degree)]
    out: list[list] = [[None] * len(columns) for _ in range(P)]
    if P == 0:
        return out
    K_fn = kernel_fn(kernel)
    unused: dict[str, list[int]] = {}      # positions of each name (a name may be listed twice)
    for j, nm in enumerate(columns):
        unused.setdefault(nm, []).append(j)
    for names, data in side_data_many(st, columns, 0.0):     # u = x here: centred below
        idx = [unused[nm].pop(0) for nm in names]
        x, n = data.u, data.n
        S1, S2 = data.s1.reshape(x.size, -1), data.s2.reshape(x.size, -1)
        good = np.isfinite(h) & (h > 0)
        J, valid = _near(x, c, np.where(good, h, 0.0))     # each point's bins, padded
        V = x[J] - c[:, None]
        right = np.where(rc[:, None], V >= 0, V > 0)
        with np.errstate(invalid="ignore", divide="ignore"):
            K = np.where(good[:, None] & valid, K_fn(V / np.where(good, h, 1.0)[:, None]), 0.0)
        n, S1, S2 = n[J], S1[J], S2[J]
        inside = K > 0
        sides = [inside & ~right, inside & right]
        dl, dr = sides[0].sum(axis=1), sides[1].sum(axis=1)
        nl, nr = (sides[0] * n).sum(axis=1), (sides[1] * n).sum(axis=1)
        fit = np.zeros(P, bool)
        for i in range(P):
            counts = (int(nl[i]), int(nr[i]), int(dl[i]), int(dr[i]))
            bad = _check_support(float(c[i]), float(h[i]), kernel, d, counts)
            if bad is not None:
                for j in idx:
                    out[i][j] = bad
            else:
                fit[i] = True
        if not fit.any():
            continue
        got = _fit_points(V, K, sides, n, S1, S2, d, np.flatnonzero(fit))
        dof = 2 * (d + 1)
        for i, parts in got.items():
            counts = (int(nl[i]), int(nr[i]), int(dl[i]), int(dr[i]))
            if parts is None:
                for j in idx:
                    out[i][j] = _not_estimable(float(c[i]), float(h[i]), kernel, d,
                                               "singular local fit", *counts)
                continue
            e, sl, v = parts
            n_h = nl[i] + nr[i]
            scale = n_h / (n_h - dof) if n_h > dof else float("nan")
            for col, j in enumerate(idx):
                se = float(np.sqrt((v[0, col] + v[1, col]) * scale))
                bl, br = (e[0, col], sl[0, col]), (e[1, col], sl[1, col])
                out[i][j] = _finish(float(c[i]), float(h[i]), kernel, d, br[0] - bl[0], se, bl,
                                    br, counts)
    return out


def _near(x, c, h):
    """Indices of the bins each point's window can reach, padded to one width: (points ×
    width indices, mask of the real ones).  With ``x`` sorted the window |x − c| < h is one run
    of bins, found by binary search and widened by a bin on each side against rounding (the
    kernel weights decide); otherwise every bin."""
    B = x.size
    if B == 0 or not np.all(np.diff(x) > 0):
        J = np.broadcast_to(np.arange(B), (c.size, B))
        return J, np.ones(J.shape, bool)
    lo = np.maximum(np.searchsorted(x, c - h, "left") - 1, 0)
    hi = np.minimum(np.searchsorted(x, c + h, "right") + 1, B)
    hi = np.maximum(hi, lo)
    width = max(int((hi - lo).max()), 1)
    J = lo[:, None] + np.arange(width)[None, :]
    valid = J < hi[:, None]
    return np.minimum(J, B - 1), valid


def _fit_points(V, K, sides, n, S1, S2, d, pts) -> dict:
    """{point: (intercepts, slopes, variances) per side and column, or None where singular}:
    all points in one :func:`side_fits`, or — if some moment matrix is singular — halves of
    them until the singular ones are alone."""
    try:
        e, sl, v = side_fits(V[pts], K[pts], [s[pts] for s in sides], n[pts], S1[pts], S2[pts],
                             d)
    except np.linalg.LinAlgError:
        if pts.size == 1:
            return {int(pts[0]): None}
        h = pts.size // 2
        return {**_fit_points(V, K, sides, n, S1, S2, d, pts[:h]),
                **_fit_points(V, K, sides, n, S1, S2, d, pts[h:])}
    return {int(i): (e[:, q], sl[:, q], v[:, q]) for q, i in enumerate(pts)}


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
