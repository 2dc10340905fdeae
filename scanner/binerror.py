"""How far a fit from fixed-width bins can be from the same fit on the rows.

A local polynomial fit from bins puts every row of a bin at the bin mean x̄_b.  On exact-support
bins that is exact.  On fixed-width bins the one-sided intercept moves by

    â − ã = e₁'S⁻¹ Σ_b Σ_{i∈b} [g(x_i, y_i) − g(x̄_b, y_i)],   g(x, y) = K((x−c)/h) r(x−c) (y − r(x−c)'β̃),

where ``r(u) = (1, u, …, u^p)``, ``S`` the weighted moment matrix and ``β̃`` the binned fit
(the identity ``S⁻¹T − S̃⁻¹T̃ = S⁻¹(ΔT − ΔS β̃)`` of weighted least squares; a first-order
perturbation argument, as in the linear-binning error analysis of Hall & Wand 1996,
*Statistics and Computing* 6 — from memory).  Expanding g in x about x̄_b, the term linear in
(x_i − x̄_b) multiplies Σ(x_i − x̄_b)(y_i − ȳ_b) plus ȳ_b Σ(x_i − x̄_b), both bounded by
Cauchy–Schwarz with the within-bin sums the bins keep (Σx, Σx², Σy, Σy²); the quadratic term
is bounded by ½ Σ(x_i − x̄_b)² times the second derivative.  A bin on the edge of the kernel
window (where K has a kink or, for the uniform kernel, a step) is bounded by the Lipschitz
constant, or by the whole weight of the rows that may fall outside.  ``S`` is replaced by its
binned value, so the bound holds up to terms of third order in (bin width / bandwidth).

A bin that holds rows on both sides of the cutoff is not covered by this expansion: then the
bound is infinite and the reason says so.  The binning pass splits bins at declared and round
cutoffs (:mod:`scanner.bins`), so this happens only for a user-set bin width or a round value
that the grid could not split exactly.
"""
from __future__ import annotations

import numpy as np

from .bins import BinnedStats
from .estimate.local import powers

NEGLIGIBLE = 0.25  # our rule: a bound above a quarter of the SE of the jump is flagged "binning"
Z_BOUND = 3.0      # noise part of the binning error bounded at 3 standard deviations (our rule)


def _kernel_derivs(name: str, t: np.ndarray):
    """K(t), dK/dt and d²K/dt² on the open window |t| < 1 (0 outside)."""
    inside = np.abs(t) < 1
    if name == "triangular":
        return (np.where(inside, 1 - np.abs(t), 0.0), np.where(inside, -np.sign(t), 0.0),
                np.zeros_like(t))
    if name == "epanechnikov":
        return (np.where(inside, 0.75 * (1 - t * t), 0.0), np.where(inside, -1.5 * t, 0.0),
                np.where(inside, -1.5, 0.0))
    return np.where(inside, 0.5, 0.0), np.zeros_like(t), np.zeros_like(t)


def _dpowers(u: np.ndarray, degree: int, order: int) -> np.ndarray:
    """Derivative of order 1 or 2 of the columns (1, u, …, u^p)."""
    out = np.zeros((u.size, degree + 1))
    for j in range(order, degree + 1):
        coef = j if order == 1 else j * (j - 1)
        out[:, j] = coef * u ** (j - order)
    return out


def _derivs(u, h, kernel, degree, beta):
    """At points u: K r, d(K r)/dx, d²(K r)/dx², d(K r f)/dx, d²(K r f)/dx² (f = r'β)."""
    K, dK, d2K = _kernel_derivs(kernel, u / h)
    Kx, Kxx = dK / h, d2K / h ** 2
    R, dR, d2R = powers(u, degree), _dpowers(u, degree, 1), _dpowers(u, degree, 2)
    f, df, d2f = R @ beta, dR @ beta, d2R @ beta
    a = Kx[:, None] * R + K[:, None] * dR
    a2 = Kxx[:, None] * R + 2 * Kx[:, None] * dR + K[:, None] * d2R
    krf = R * f[:, None]
    dkrf = dR * f[:, None] + R * df[:, None]
    d2krf = d2R * f[:, None] + 2 * dR * df[:, None] + R * d2f[:, None]
    c = Kx[:, None] * krf + K[:, None] * dkrf
    c2 = Kxx[:, None] * krf + 2 * Kx[:, None] * dkrf + K[:, None] * d2krf
    return K[:, None] * R, a, a2, c, c2, f


def side_bound(u, lo, hi, cnt, n_all, vx, Y, Y2, h, kernel: str, degree: int):
    """(bound, worst case) on |row-level intercept − binned intercept| on one side (arrays per bin).

    u : bin mean minus cutoff; lo, hi : bin interval minus cutoff; cnt : rows with the column
    present; n_all : rows; vx : Σ(x − x̄)² over all rows of the bin; Y, Y2 : Σy, Σy².

    Bound.  Write y_i = m(x_i) + e_i.  With m the fitted polynomial f, the first-order terms
    cancel and the difference is −½ Σ_b K_b r_b f''_b Σ(x − x̄)² plus the noise term
    Σ_i e_i (K_i r_i − K_b r_b), of mean 0 and variance ≤ σ_b² |d(K r)/dx|² Σ(x − x̄)² per bin
    (σ_b² the within-bin variance of y), taken at Z_BOUND standard deviations.  A slope misfit
    m' − f' of up to |f'| adds Σ_b |e₁'S⁻¹ d(K r)/dx| |f'_b| Σ(x − x̄)².  At the window edge the
    derivative is the one inside the window (a Lipschitz bound); for the uniform kernel, whose
    weight steps there, every row of an edge bin may fall on either side of the step.

    Worst case.  y any arrangement of the bin's values: Cauchy–Schwarz on the first-order term
    and on the second-order term, which no smooth design reaches.
    """
    K = _kernel_derivs(kernel, u / h)[0]
    R = powers(u, degree)
    S = (R * (K * cnt)[:, None]).T @ R
    try:
        Sinv = np.linalg.inv(S)
    except np.linalg.LinAlgError:
        return float("nan"), float("nan")
    beta = Sinv @ ((R * K[:, None]).T @ Y)
    L = Sinv[0]
    KR, a, a2, c, c2, _ = _derivs(u, h, kernel, degree, beta)
    df = _dpowers(u, degree, 1) @ beta
    d2f = _dpowers(u, degree, 2) @ beta
    safe = np.maximum(cnt, 1)
    ybar = Y / safe
    vy = np.maximum(Y2 - Y * Y / safe, 0.0)
    sig2 = vy / np.maximum(cnt - 1, 1)
    # Rows where the column is missing: Σ_present (x − x̄) is 0 when none is; otherwise, with
    # rows missing at random within the bin, its variance is Σ(x − x̄)² · q(1 − q).
    share = cnt / np.maximum(n_all, 1)
    miss = np.where(cnt < n_all, vx * share * (1 - share), 0.0)
    La, Lm = a @ L, (a * ybar[:, None] - c) @ L
    edge = ((lo < -h) & (hi > -h)) | ((lo < h) & (hi > h))
    noise = La ** 2 * sig2 * vx
    if edge.any():
        inside = np.clip(u, -h * (1 - 1e-9), h * (1 - 1e-9))
        _, ai, _, ci, _, fi = _derivs(inside, h, kernel, degree, beta)
        Lai = ai @ L
        if kernel == "uniform":
            step = 0.25 * (powers(inside, degree) @ L) ** 2 * sig2 * cnt
            noise = np.where(edge, step, noise)
        else:
            noise = np.where(edge, Lai ** 2 * sig2 * vx, noise)
        La = np.where(edge, np.maximum(np.abs(La), np.abs(Lai)), La)
    det = abs(0.5 * np.sum((KR @ L) * d2f * vx)) + np.sum(np.abs(La * df) * vx)
    bound = det + Z_BOUND * np.sqrt(np.sum(noise) + np.sum(Lm ** 2 * miss))
    width = hi - lo
    sq_y = np.abs(ybar) * vx + width * np.sqrt(vx * vy)
    worst = (np.abs(La) * np.sqrt(vx * vy) + np.abs(Lm) * np.sqrt(cnt * vx) * (cnt < n_all)
             + 0.5 * (np.abs(a2 @ L) * sq_y + np.abs(c2 @ L) * vx))
    if edge.any():
        lip = np.abs(La) * np.sqrt(vx * np.maximum(Y2, 0)) + np.abs(c @ L) * np.sqrt(cnt * vx)
        if kernel == "uniform":
            resid2 = np.maximum(Y2 - 2 * (R @ beta) * Y + cnt * (R @ beta) ** 2, 0.0)
            lip = 0.5 * np.abs(R @ L) * np.sqrt(cnt * resid2)
        worst = np.where(edge, lip, worst)
    return float(bound), float(np.sum(worst))


def binning_error(stats: BinnedStats, column: str, cutoff: float, h_left: float,
                  h_right: float | None = None, kernel: str = "triangular", degree: int = 1,
                  right_closed: bool = True, worst: bool = False):
    """A bound on |jump from bins − jump from the rows| for one local polynomial fit.

    Returns (bound, reason): 0 for exact-support bins, ``inf`` with a reason when a bin holds
    rows on both sides of the cutoff, NaN when a side has too few bins to fit.  With ``worst``
    the worst case over every arrangement of y within the bins is returned instead.
    """
    if stats.kind == "exact":
        return 0.0, None
    st = stats.pooled()
    if st.straddles(cutoff, right_closed):
        return float("inf"), (f"a fixed-width bin holds rows on both sides of {cutoff:g}; the fit "
                              "moves them all to one side")
    h_right = h_left if h_right is None else h_right
    j = st.col(column)
    cnt = st.cnt[:, j].astype(float)
    n_all = st.n.astype(float)
    lo, hi = st.bounds()
    x = st.x
    vx = np.maximum(st.sxx - st.sx * st.sx / np.maximum(n_all, 1), 0.0)
    u = x - cutoff
    right = (u >= 0) if right_closed else (u > 0)
    total = 0.0
    for side, h in ((~right, h_left), (right, h_right)):
        m = side & (cnt > 0) & (hi - cutoff > -h) & (lo - cutoff < h)
        if m.sum() <= degree:
            return float("nan"), None
        b = side_bound(u[m], lo[m] - cutoff, hi[m] - cutoff, cnt[m], n_all[m], vx[m],
                       st.s1[m, j], st.s2[m, j], h, kernel, degree)
        total += b[1] if worst else b[0]
    return total, None
