"""Local polynomial density test (Cattaneo, Jansson & Ma 2020) computed from bin counts.

Estimator (Cattaneo, Jansson & Ma 2020, JASA 115(531); docs/methods.md, "Density tests"): on
each side of the cutoff, a kernel-weighted polynomial of degree ``p`` (default 2) in u = x − c is fitted to the
empirical CDF F̂(X_i) = #{X_j ≤ X_i}/N using only that side's rows; the coefficient on u is the
density estimate f̂±(c).  Bins enter through their counts: every row of a bin sits at the bin's
representative x and carries the same F̂.

* Every row of a bin gets the mean of the bin's ranks, F̂_b = (rows in earlier bins +
  (n_b + 1)/2)/N.  With distinct values (one row per exact bin) this is exactly the row-level
  F̂.  With ties (a lattice such as integers or one decimal) it is the mid-rank CDF — ties broken
  at random and averaged — which is the CDF at the centre of the support point's share of the
  lattice; the density is then evaluated at the midpoint between the last support point left of
  the cutoff and the first one right of it, where the two one-sided lattices are mirror images
  (with the plain F̂ at the cutoff itself, the lattice offset makes the two sides' biases differ
  and the test over-rejects on coarse lattices).
* Fixed-width bins: rows are placed at the bin mean Σx/n with the same mid-rank F̂.  This
  replaces a within-bin spread of width w by its centre; the error in the fitted slope is of
  order (w/h)², negligible when the bin width is small against the bandwidth (the default grid
  has about 2,000 bins, so w/h is below 0.05 in practice).

Variance: the influence-function plug-in of docs/methods.md ("Density tests"),
ψ_j = Σ_i ℓ_i (1{X_j ≤ X_i} − F̂(X_i)), V̂ = Σ_j ψ_j² / N², with ℓ the slope weights of the side's fit; the test uses
ψ_j⁺ − ψ_j⁻.  It is a sum over bins of j (rows of a bin share ψ_j).

Bandwidth and inference (our choices, written down here): one common bandwidth h for both sides,
found on a geometric grid (at most one scale unit s of the running variable, and at most
four times the normal-reference scale 1.06·s·N^(-1/5)) by minimising
the null-hypothesis MSE of f̂⁺ − f̂⁻.  With a common bandwidth the leading h² bias of f̂⁺ and f̂⁻
is the same multiple of f''(c) (the two one-sided problems are mirror images), so under the null
of a smooth density it nearly cancels in the difference; the bias used is the sample version —
the difference's slope weights applied to the cubic and quartic terms of F, f''(c)u³/6 +
f'''(c)u⁴/24, as in CCT 2014's bias correction — with f'', f''' from one quintic fit of F̂ across
the cutoff within one scale unit s (a quartic density; a sextic fit made the f''' pilot four
times noisier, which pulled the chosen h down and cost power — measured in
benchmarks/results/density.md).  Because the leading bias cancels, the test uses the
conventional statistic with p = 2 and no explicit bias correction [DERIVED; checked by the size
simulation in benchmarks/density_size_power.py].

The scale s is Silverman's skew-resistant min(sd, IQR/1.349) (Silverman 1986, eq. 3.30;
:func:`scanner.estimate.mse.robust_scale`, the scale of the estimator's pilot bandwidth).  With
the plain sd, a lognormal(0, 2) score (sd in the hundreds, IQR/1.349 about 2.7) let the cap
reach 0.97 at a cutoff of 1, where the density falls by half over that distance; the unmodelled
curvature then rejected a smooth density at p ≈ 1e-174.  For a normal score the two scales agree.
"""
from __future__ import annotations

import numpy as np

from ..bins import BinnedStats
from ..estimate.kernels import kernel as kernel_fn
from ..estimate.local import two_sided_p
from ..estimate.mse import robust_scale
from .density import DensityTest

MIN_SIDE_POINTS = 4      # a local quadratic CDF fit needs more than p + 1 support points
PILOT_DEGREE = 5         # degree of the global pilot fit of F̂ (a quartic density)
CAP_MULTIPLE = 4         # bandwidth cap, in units of the normal-reference scale 1.06·sd·N^(-1/5)


def cdf_points(stats: BinnedStats, drop=None):
    """Sorted (x, n, F̂) over occupied bins; ``drop`` is a boolean mask of bins to leave out.

    Dropped bins are removed before F̂ is formed, so F̂ is the CDF of the remaining rows (used
    for the density test without heaped values).
    """
    x, n = stats.support_counts(drop)
    cum = np.cumsum(n)
    N = cum[-1] if cum.size else 0.0
    F = (cum - (n - 1) / 2) / N
    return x, n, F, N


def _side_fit(u, n, F, side, h, p, kern):
    """Slope fit on one side: (f̂, per-row slope weights ℓ over all bins, bias factor Σnℓu³)."""
    K = kernel_fn(kern)(u / h)
    m = side & (K > 0)
    if m.sum() < max(MIN_SIDE_POINTS, p + 2):
        return None
    t = u[m] / h
    R = np.vander(t, p + 1, increasing=True)
    w = n[m] * K[m]
    A = (R * w[:, None]).T @ R
    try:
        Ainv = np.linalg.inv(A)
    except np.linalg.LinAlgError:
        return None
    ell = np.zeros_like(u)
    ell[m] = (R @ Ainv[:, 1]) * K[m] / h          # per-row weight of the slope coefficient
    f = float((n * ell * F).sum())
    cubic = float((n * ell * u ** 3).sum())        # slope weights applied to u³
    return f, ell, cubic


def _psi(n, ell, f):
    """Influence values per bin j: Σ_i ℓ_i 1{X_j ≤ X_i} − f̂ (suffix sums over sorted bins)."""
    g = n * ell
    return np.cumsum(g[::-1])[::-1] - f


def _var(n, psi, N):
    return float((n * psi ** 2).sum() / N ** 2)


def _pilot_pooled(u, n, F, reach, degree=PILOT_DEGREE):
    """f''(c), f'''(c) from one weighted quintic fit of F̂ across the cutoff within ``reach``.

    The fit carries an extra term u·1{u ≥ 0}, a kink in F (a jump in the density at the cutoff),
    so a density jump under the alternative is not mistaken for curvature.
    """
    k = np.abs(u) <= reach
    if k.sum() < 12:
        return 0.0, 0.0
    t = u[k] / reach
    X = np.column_stack([np.vander(t, degree + 1, increasing=True), t * (t >= 0)])
    sw = np.sqrt(n[k])
    coef = np.linalg.lstsq(X * sw[:, None], F[k] * sw, rcond=None)[0]
    return float(6 * coef[3] / reach ** 3), float(24 * coef[4] / reach ** 4)


def _mse_bandwidth(u, n, F, N, left, right, p, kern):
    """Common h minimising the null MSE of f̂⁺ − f̂⁻ (bias from the u³ and u⁴ terms of F)."""
    hs, mse = _mse_curve(u, n, F, N, left, right, p, kern)
    if hs.size == 1:
        return float(hs[0])
    ok = np.isfinite(mse)
    return float(hs[ok][np.argmin(mse[ok])]) if ok.any() else float("nan")


def _mse_curve(u, n, F, N, left, right, p, kern):
    """(grid of h, null MSE of f̂⁺ − f̂⁻ at each h); NaN where a side cannot be fitted.

    A grid of one point (the smallest usable h, without an MSE) when the cap leaves no range.
    """
    nan = np.array([np.nan])
    s = robust_scale(u, n)          # skew-resistant scale (module docstring)
    hs = []
    for side in (left, right):
        d = np.sort(np.abs(u[side]))
        if d.size < MIN_SIDE_POINTS + 1:
            return nan, nan
        hs.append((d[min(d.size - 1, MIN_SIDE_POINTS + 1)] * 1.01, d[-1]))
    # The bias model keeps only the f'' and f''' terms, whose leading part cancels in the
    # difference; at large N even small unmodelled bias then dominates a wide window.  So the
    # grid stops at four times the normal-reference scale 1.06*s*N^(-1/5) (Silverman 1986; common
    # practice for the scale of a density bandwidth).
    cap = CAP_MULTIPLE * 1.06 * s * N ** (-0.2)
    lo, hi = max(a for a, _ in hs), min(min(b for _, b in hs), s, cap)
    if not hi > lo:
        return np.array([lo]), nan
    f2, f3 = _pilot_pooled(u, n, F, s)
    # Only bins within the widest h enter the fits; the others carry ψ_j = S − f̂ (left of the
    # window, S = Σ nℓ, zero up to rounding) or −f̂ (right of it), added in closed form, so the
    # search costs O(bins in the window) and gives the same MSE as the full sums.
    inside = np.abs(u) < hi
    idx = np.flatnonzero(inside)
    n_before, n_after = n[:idx[0]].sum(), n[idx[-1] + 1:].sum()
    u, n_in, F, left, right = u[inside], n[inside], F[inside], left[inside], right[inside]
    grid = np.geomspace(lo, hi, 20)
    mse = np.full(grid.size, np.nan)
    for i, h in enumerate(grid):
        fits = [_side_fit(u, n_in, F, side, h, p, kern) for side in (left, right)]
        if any(f is None for f in fits):
            continue
        (fl, ell_l, _), (fr, ell_r, _) = fits
        bias = (n_in * (ell_r - ell_l) * (f2 / 6 * u ** 3 + f3 / 24 * u ** 4)).sum()
        psi = _psi(n_in, ell_r, fr) - _psi(n_in, ell_l, fl)
        jump = fr - fl
        outside = n_before * ((n_in * (ell_r - ell_l)).sum() - jump) ** 2 + n_after * jump ** 2
        mse[i] = bias ** 2 + ((n_in * psi ** 2).sum() + outside) / N ** 2
    return grid, mse


def _fail(reason, h=float("nan")):
    nan = float("nan")
    return DensityTest("local polynomial", nan, nan, nan, nan, nan, nan, h, reason)


def lp_density_test(stats: BinnedStats, cutoff: float, right_closed: bool = True,
                    bandwidth: float | None = None, degree: int = 2, kernel: str = "triangular",
                    drop=None) -> DensityTest:
    """Cattaneo–Jansson–Ma (2020) test of a jump in the running variable's density at ``cutoff``.

    Parameters
    ----------
    stats : BinnedStats of the running variable (only the counts are used).
    cutoff : cutoff value (running-variable units).
    right_closed : rows at the cutoff belong to the right side.
    bandwidth : common half-width h (running-variable units); default the null-MSE-optimal
        common bandwidth of the module docstring.
    degree : polynomial degree of the CDF fit (2: local-linear-type density estimate).
    drop : optional boolean mask of bins to leave out (e.g. heaped values).

    Returns
    -------
    DensityTest with θ = ln f̂⁺ − ln f̂⁻, its delta-method SE, and the p-value of the
    t-statistic (f̂⁺ − f̂⁻)/se.

    Notes
    -----
    Cattaneo, Jansson & Ma (2020), JASA 115(531); influence-function variance in
    docs/methods.md ("Density tests").
    """
    x, n, F, N = cdf_points(stats, drop)
    if N < 20:
        return _fail("fewer than 20 rows")
    right = x >= cutoff if right_closed else x > cutoff
    left = ~right
    at = cutoff
    if right.any() and left.any() and stats.kind == "exact":
        at = (x[left].max() + x[right].min()) / 2     # mirror point of the two lattices
    u = x - at
    if left.sum() < MIN_SIDE_POINTS or right.sum() < MIN_SIDE_POINTS:
        return _fail(f"fewer than {MIN_SIDE_POINTS} distinct values on a side")
    h = bandwidth
    if h is None:
        h = _mse_bandwidth(u, n, F, N, left, right, degree, kernel)
        if not np.isfinite(h):
            return _fail("no usable bandwidth")
    fl, fr = _side_fit(u, n, F, left, h, degree, kernel), _side_fit(u, n, F, right, h, degree, kernel)
    if fl is None or fr is None:
        return _fail(f"fewer than {MIN_SIDE_POINTS} distinct values on a side within the bandwidth", h)
    (f_l, ell_l, _), (f_r, ell_r, _) = fl, fr
    psi_l, psi_r = _psi(n, ell_l, f_l), _psi(n, ell_r, f_r)
    v_l, v_r, v_d = _var(n, psi_l, N), _var(n, psi_r, N), _var(n, psi_r - psi_l, N)
    if not (f_l > 0 and f_r > 0) or not v_d > 0:
        return _fail("estimated density is not positive on both sides", h)
    t = (f_r - f_l) / np.sqrt(v_d)
    theta = float(np.log(f_r / f_l))
    se_theta = float(np.sqrt(v_l / f_l ** 2 + v_r / f_r ** 2))
    p = two_sided_p(t)
    return DensityTest("local polynomial", theta, se_theta, p, float(f_l), float(f_r),
                       float("nan"), float(h))
