"""Scanning for cutoffs nobody declared: grid of jumps, search-adjusted test, location.

For one running variable × treatment the scan works on BinnedStats only:

1. **Grid.** Coarse running variables (exact support with at most ``max_grid`` values in the
   bulk) use every support point; continuous ones a quantile grid of ``max_grid`` points snapped
   to support values (exact bins) or bin edges (fixed-width bins), so the grid cutoff splits
   bins cleanly.  The bulk is the 2nd–98th percentile range, and a grid point is kept only when
   each side holds at least ``min_rows`` rows and two distinct values with positive kernel weight.
2. **Jumps.** Local linear jump at every grid point with one common pilot bandwidth
   ``h = 4·s·N^(-1/5)`` (s = min(sd, IQR/1.349) of the running variable, N rows; widened on a
   coarse support to reach three support points per side).  The pilot is deliberately wider
   than an MSE-optimal bandwidth: a smooth curve has no leading-order jump bias, and a wider
   window gives the search more power; the confirmed estimate uses the usual bandwidth.
   Each window is gathered from the sorted bins (cost: grid points × bins per window), which is
   exact — no prefix sums of high powers of x, whose differences lose precision in narrow windows.
3. **Search-adjusted test.** The statistic is sup_g |t_g| (Porter & Yu 2015, J. Econometrics
   189: the sup of the standardised squared jump).  Each jump is linear in the bin sums,
   τ̂_g = Σ_b ℓ_gb Σy_b, so under "no jump anywhere" the jumps are jointly normal with
   Cov(τ̂_g, τ̂_g') = Σ_b ℓ_gb ℓ_g'b n_b σ²_b, σ²_b the conditional variance near bin b (pooled
   over consecutive bins holding at least ``VAR_ROWS`` rows).  The critical value and p-values
   come from a Gaussian multiplier simulation of that correlation (eigen-decomposition of the
   grid × grid matrix, ``draws`` draws); no row is resampled.  Beyond the reach of the draws the
   p-value is the Bonferroni bound over the grid, which is always valid.  Each t divides by
   se_t = sqrt(max(HC1, pooled)), the pooled variance being the two sides' kernel-weighted mean
   squared residual times Σℓ² (the homoskedastic variance of the same fit): where uptake is
   constant on one side, the HC1 variance loses that side and |t| would peak at a biased
   window; a larger SE only makes the test conservative.
4. **Location and further breaks** live in :mod:`scanner.breaks`: the largest jump among the
   points that pass the critical value, refined by a one-break least-squares fit with a
   likelihood-ratio location set (:mod:`scanner.locate`), then a sequential search for more.

Held-out confirmation (Card, Mas & Rothstein 2008, QJE 123(1)) is orchestrated in
:mod:`scanner.scan`: the scan runs on half 0, the estimate and test on half 1.  The half is a
key of BinnedStats filled during the one binning pass (``BinPlan.split_seed`` = ``search.seed``
when ``search.discover`` and ``search.confirm`` are on).  With ``data.unit`` set, the half is a
seeded hash of the unit id, so every row of a person lands in the same half and the split does
not change when the file is re-sorted or read in other batches; without it, the half is a
seeded hash of the row position.  The held-out test allows for the worst-case smoothing bias
(:func:`bias_bound`), because a search seeks out curvature that looks like a jump.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import sparse
from scipy import stats as sps

from .bins import BinnedStats
from .engines.grid import edges, grid_of_width
from .engines.plan import weighted_quantile
from .estimate.kernels import kernel as kernel_fn
from .estimate.local import side_data
from .estimate.robust import curvature_bound
from .locate import lr_critical  # noqa: F401  (re-exported: the search's LR constant)

MAX_GRID = 500          # grid points per running variable × treatment
DRAWS = 1000            # multiplier draws for the sup-|t| null distribution
VAR_ROWS = 50           # rows pooled for each local conditional-variance estimate
PILOT_C = 4.0           # pilot bandwidth h = PILOT_C · s · N^(-1/5)
POOL_BINS = 2000        # above this many bins, pool bins into noise cells for the covariance
BULK = 0.02             # grid inside the 2nd–98th percentiles
CHUNK = 2_000_000       # gathered entries per block (memory bound)


@dataclass(frozen=True)
class GridScan:
    """Jumps at every grid point of one running variable × column (NaN where not estimable).

    ``loadings`` (grid × bins, sparse) holds the smoother weights ℓ_gb of each jump and
    ``noise`` the per-bin variance n_b σ²_b of Σy_b: Cov(τ̂_g, τ̂_g') = Σ_b ℓ_gb ℓ_g'b noise_b.
    """

    running: str
    column: str
    grid: np.ndarray
    bandwidth: float
    kind: str                       # "support" | "quantile" | "given"
    jump: np.ndarray
    se: np.ndarray
    t: np.ndarray
    n_left: np.ndarray
    n_right: np.ndarray
    n_rows: int
    loadings: object = field(default=None, repr=False)
    noise: np.ndarray = field(default=None, repr=False)
    cut_index: np.ndarray = field(default=None, repr=False)
    bin_x: np.ndarray = field(default=None, repr=False)
    se_t: np.ndarray = field(default=None, repr=False)   # the SE behind ``t`` (never collapses)

    @property
    def valid(self) -> np.ndarray:
        return ~np.isnan(self.t)


def _bins(stats: BinnedStats, column: str):
    st = stats.pooled()
    x, n, s1, s2 = st.column_sums(column)
    keep = n > 0
    x, n, s1, s2 = x[keep], n[keep], s1[keep], s2[keep]
    order = np.argsort(x, kind="stable")
    return st, x[order], n[order], s1[order], s2[order]


def pilot_bandwidth(x: np.ndarray, n: np.ndarray, coarse: bool) -> float:
    """Common pilot bandwidth ``PILOT_C · min(sd, IQR/1.349) · N^(-1/5)`` (running-variable units).

    Notes
    -----
    The scale is Silverman's robust spread (common practice); on a coarse support the bandwidth
    is widened to three support spacings so each side holds at least three support points.
    """
    N = n.sum()
    mean = (n * x).sum() / N
    sd = math.sqrt(max((n * (x - mean) ** 2).sum() / max(N - 1, 1), 0.0))
    q1, q3 = weighted_quantile(x, n, [0.25, 0.75])
    s = min(sd, (q3 - q1) / 1.349) if q3 > q1 else sd
    h = PILOT_C * s * N ** (-0.2)
    if coarse and x.size > 1:
        h = max(h, 3.0 * float(np.median(np.diff(x))) * 1.001)
    return float(h)


def scan_grid_points(stats: BinnedStats, column: str, max_grid: int = MAX_GRID):
    """The grid of candidate cutoffs and whether it is the full support ("support")."""
    st, x, n, _, _ = _bins(stats, column)
    if x.size < 4:
        return np.zeros(0), "support"
    lo, hi = weighted_quantile(x, n, [BULK, 1 - BULK])
    inner = x[(x >= lo) & (x <= hi)]
    if st.kind == "exact" and np.unique(inner).size <= max_grid:
        return np.unique(inner), "support"
    cw = np.cumsum(n) / n.sum()
    q = np.linspace(BULK, 1 - BULK, max_grid)
    pts = x[np.minimum(np.searchsorted(cw, q), x.size - 1)]
    if st.kind == "width":
        # Snap to the lower edge of the bin holding the quantile: the cutoff then splits bins cleanly.
        pts = bin_edges(st, np.floor((pts - st.origin) / st.width + 1e-9))
    return np.unique(pts), "quantile"


def bin_edges(st: BinnedStats, k) -> np.ndarray:
    """Left edges of fixed-width bins ``k``: the engines' exact decimals (origin + (k·p)/10^d).

    Notes
    -----
    ``origin + k·width`` gives 33.300000000000004 for the edge 33.3, which then differs from the
    edge the engines binned on and from a cutoff typed as 33.3 (scanner/engines/grid.py).
    """
    p, d = grid_of_width(st.width)
    e = edges(np.asarray(k, float), p, d)
    return e if not st.origin else st.origin + e


def _local_variance(n, s1, s2):
    """Conditional variance per bin, pooled over consecutive bins holding ≥ VAR_ROWS rows."""
    grp = np.floor(np.cumsum(n) / VAR_ROWS - 1e-9).astype(np.int64)
    starts = np.flatnonzero(np.r_[True, grp[1:] != grp[:-1]])
    gn, g1, g2 = (np.add.reduceat(a, starts) for a in (n, s1, s2))
    var = np.maximum(g2 - g1 * g1 / gn, 0.0) / np.maximum(gn - 1, 1)
    return var[np.cumsum(np.r_[True, grp[1:] != grp[:-1]]) - 1]


def scan_grid(stats: BinnedStats, column: str, grid=None, bandwidth: float | None = None,
              kernel: str = "triangular", right_closed: bool = True, min_rows: int = 50,
              loadings: bool = True, max_grid: int = MAX_GRID, walls=()) -> GridScan:
    """Local linear jumps of ``column`` at every grid point with one bandwidth.

    Parameters
    ----------
    stats : BinnedStats of the running variable (period/half keys are summed over).
    column : tracked column (a treatment).
    grid : cutoffs (running-variable units); default :func:`scan_grid_points`.
    bandwidth : common bandwidth h (running-variable units); default :func:`pilot_bandwidth`.
    kernel : kernel name; right_closed : rows at x == cutoff go right when True.
    min_rows : rows needed on each side inside the window for a grid point to count.
    loadings : also build the sparse loading matrix for the null simulation.
    walls : locations of breaks already found; windows stop at them and grid points on them
        are not estimable (sequential search, Bai & Perron 1998).

    Returns
    -------
    GridScan; ``jump``/``se`` equal :func:`scanner.estimate.fit_jump` (degree 1, HC1) at each
    point.  ``t = jump / se_t`` with se_t² = max(HC1, pooled): the pooled variance is the
    kernel-weighted mean squared residual of both sides times Σℓ², the homoskedastic variance
    of the same fit, so t cannot collapse where uptake is constant on one side of the window.

    Notes
    -----
    Local linear jump (Hahn, Todd & van der Klaauw 2001) with the HC1 sandwich of
    scanner.estimate.local; grid and statistic after Porter & Yu (2015).  A larger SE only
    makes |t| smaller, so the sup-|t| test stays valid (conservative) with se_t.
    """
    st, x, n, s1, s2 = _bins(stats, column)
    kind = "support"
    if grid is None:
        grid, kind = scan_grid_points(stats, column, max_grid)
    else:
        kind = "given"
    grid = np.asarray(grid, float)
    if bandwidth is None:
        bandwidth = pilot_bandwidth(x, n, kind == "support" and st.kind == "exact")
    h = float(bandwidth)
    K = kernel_fn(kernel)
    G = grid.size
    nan = np.full(G, np.nan)
    jump, se, se_t = nan.copy(), nan.copy(), nan.copy()
    nl, nr = np.zeros(G, np.int64), np.zeros(G, np.int64)
    lo = np.searchsorted(x, grid - h, side="right")
    hi = np.searchsorted(x, grid + h, side="left")
    walls = np.sort(np.asarray(walls, float))
    on_wall = np.isin(grid, walls)
    if walls.size:
        # Breaks already found (Bai & Perron 1998): no window reaches across one.  A wall w
        # sends x ≥ w to its right, so a later grid point's left side starts at w.
        j = np.searchsorted(walls, grid, side="left")           # walls[j-1] < g ≤ walls[j]
        wl = np.where(j > 0, walls[np.maximum(j - 1, 0)], -np.inf)
        wr = np.where(j < walls.size, walls[np.minimum(j, walls.size - 1)], np.inf)
        lo = np.maximum(lo, np.searchsorted(x, wl, side="left"))
        hi = np.minimum(hi, np.searchsorted(x, wr, side="left"))
    width = max(int((hi - lo).max()), 0) if G else 0
    rows, cols, vals = [], [], []
    sig = n * _local_variance(n, s1, s2) if loadings and x.size else None
    mean = s1 / n
    within = np.maximum(s2 - s1 * mean, 0.0)
    step = max(1, CHUNK // max(width, 1))
    for a in range(0, G, step):
        g = slice(a, min(G, a + step))
        c = grid[g][:, None]
        idx = lo[g][:, None] + np.arange(width)[None, :]
        ok = idx < hi[g][:, None]
        idx = np.minimum(idx, max(x.size - 1, 0))
        u = x[idx] - c
        w = np.where(ok, K(u / h), 0.0)
        right = (u >= 0) if right_closed else (u > 0)
        nb, sb, mb, wb = n[idx], s1[idx], mean[idx], within[idx]
        lw = np.zeros_like(u)
        var = np.zeros(u.shape[0])
        l2 = np.zeros(u.shape[0])            # Σ_rows ℓ² (pooled variance)
        wr2 = np.zeros(u.shape[0])           # Σ_rows w·e²
        wsum = np.zeros(u.shape[0])          # Σ_rows w
        enough = ~on_wall[g]
        alpha = []
        for side, sign in ((~right, -1.0), (right, 1.0)):
            ws = w * side
            wn = ws * nb
            S0, S1, S2 = wn.sum(1), (wn * u).sum(1), (wn * u * u).sum(1)
            T0, T1 = (ws * sb).sum(1), (ws * sb * u).sum(1)
            det = S0 * S2 - S1 * S1
            cnt = (wn > 0).sum(1)
            rows_side = (side & ok & (w > 0)) * nb
            nside = rows_side.sum(1)
            enough &= (cnt >= 2) & (nside >= min_rows) & (det > 1e-12 * np.maximum(S0, 1) ** 2 * h * h)
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                # A side with no rows (next to a wall) gives NaN here; ``enough`` drops it.
                al = (S2 * T0 - S1 * T1) / det
                be = (S0 * T1 - S1 * T0) / det
                ell = ws * (S2[:, None] - S1[:, None] * u) / det[:, None]
                fit = al[:, None] + be[:, None] * u
                rss = wb + nb * (mb - fit) ** 2
                var += np.where(ws > 0, ell * ell * rss, 0.0).sum(1)
                l2 += np.where(ws > 0, nb * ell * ell, 0.0).sum(1)
                wr2 += np.where(ws > 0, ws * rss, 0.0).sum(1)
            wsum += wn.sum(1)
            lw += sign * np.where(ws > 0, ell, 0.0)
            alpha.append(al)
            (nl if sign < 0 else nr)[g] = nside
        n_h = nl[g] + nr[g]
        with np.errstate(invalid="ignore", divide="ignore"):
            scale = np.where(n_h > 4, n_h / (n_h - 4.0), np.nan)
            jump[g] = np.where(enough, alpha[1] - alpha[0], np.nan)
            se[g] = np.where(enough, np.sqrt(var * scale), np.nan)
            pooled = wr2 / wsum * scale * l2
            se_t[g] = np.where(enough, np.sqrt(np.maximum(var * scale, pooled)), np.nan)
        if sig is not None:
            r, k = np.nonzero((lw != 0) & enough[:, None])
            rows.append(r + a)
            cols.append(idx[r, k])
            vals.append(lw[r, k])
    with np.errstate(invalid="ignore", divide="ignore"):
        # se_t = 0 with a jump: both sides constant in the window (a sharp rule), |t| = ∞.
        t = np.where(se_t > 0, jump / se_t, np.where(np.abs(np.nan_to_num(jump)) > 1e-12,
                                                     np.sign(jump) * np.inf, np.nan))
    L = None
    if sig is not None:
        cat = (lambda parts, dt: np.concatenate(parts) if parts else np.zeros(0, dt))
        L = sparse.csr_matrix((cat(vals, float), (cat(rows, np.int64), cat(cols, np.int64))),
                              shape=(G, x.size))
    cut = np.searchsorted(x, grid, side="left" if right_closed else "right")
    return GridScan(stats.running, column, grid, h, kind, jump, se, t, nl, nr, int(n.sum()), L,
                    sig, cut, x, se_t)


@dataclass(frozen=True)
class NullSup:
    """Simulated null distribution of sup_g |t_g| over the valid grid points."""

    draws: np.ndarray        # sorted sup-|t| draws
    n_points: int            # valid grid points

    def critical(self, alpha: float) -> float:
        return float(np.quantile(self.draws, 1 - alpha)) if self.draws.size else float("nan")

    def p_value(self, t: float) -> float:
        """Search-adjusted p-value of |t|: simulated, capped by the Bonferroni bound."""
        if np.isnan(t) or self.n_points == 0:
            return float("nan")
        if np.isinf(t):
            return 0.0
        R = self.draws.size
        exceed = R - np.searchsorted(self.draws, abs(t), side="left")
        p_sim = (1 + exceed) / (R + 1)
        p_bonf = self.n_points * 2 * sps.norm.sf(abs(t))
        return float(min(1.0, p_sim, p_bonf))


def _root(R: np.ndarray) -> np.ndarray:
    """A square root B with B B' ≈ R: Cholesky with a tiny ridge (adjacent grid points are
    almost perfectly correlated), eigen-decomposition if that still fails."""
    # A ridge of 1e-4 adds independent noise of sd 0.01 to each unit-variance point: far
    # below the simulation error of a 95% quantile, and it keeps the factorisation stable.
    ridge = 1e-4
    try:
        return np.linalg.cholesky(R + ridge * np.eye(R.shape[0])) / math.sqrt(1 + ridge)
    except np.linalg.LinAlgError:
        pass
    lam, V = np.linalg.eigh(R)
    return V * np.sqrt(np.clip(lam, 0.0, None))


def _covariance(scan: GridScan, ok: np.ndarray, cells_per_h: int = 16) -> np.ndarray:
    """Null covariance of the jumps at grid points ``ok``: Σ_b ℓ_gb ℓ_g'b noise_b.

    With more than ``POOL_BINS`` bins and many bins per bandwidth the bins are pooled into noise cells no wider than
    h/``cells_per_h`` that never straddle a grid cutoff, each cell's weight the noise-weighted
    mean ℓ; the error is second order in cell width / h and the cost drops from grid × bins to
    grid × cells.
    """
    L = scan.loadings[ok]
    B = L.shape[1]
    v = scan.noise
    x = scan.bin_x
    pos = np.unique(np.r_[0, scan.cut_index, B])
    step = scan.bandwidth / cells_per_h
    edges = [B]
    for a, b in zip(pos[:-1], pos[1:]):
        k = int(min(b - a, max(1, math.ceil((x[b - 1] - x[a]) / step))))
        edges.extend(a + ((b - a) * np.arange(k)) // k)
    edges = np.unique(edges)
    if B > POOL_BINS and edges.size < B / 2:
        cell = np.searchsorted(edges, np.arange(B), side="right") - 1
        V = np.bincount(cell, weights=v, minlength=edges.size)
        Vc = V[cell]
        scale = np.where(Vc > 0, 1 / np.sqrt(np.where(Vc > 0, Vc, 1)), 0.0)
        A = sparse.csr_matrix((v * scale, (np.arange(B), cell)), shape=(B, edges.size))
        M = (L @ A).toarray()
        return M @ M.T
    Ls = L @ sparse.diags(np.sqrt(v))
    return (Ls @ Ls.T).toarray()


def null_sup(scan: GridScan, draws: int = DRAWS, seed: int = 0) -> NullSup:
    """Gaussian multiplier simulation of sup |t| from the bins (no row resampling).

    Notes
    -----
    Cov(τ̂_g, τ̂_g') = Σ_b ℓ_gb ℓ_g'b n_b σ²_b (linear smoother, independent rows); the draws are
    Z = B ξ with B B' the correlation matrix (Cholesky factor, ξ ~ N(0, I)).
    Critical values for the sup of a Gaussian process by simulation, as in Porter & Yu (2015).
    """
    ok = np.flatnonzero(scan.valid)
    if ok.size == 0 or scan.loadings is None:
        return NullSup(np.zeros(0), 0)
    C = _covariance(scan, ok)
    # Points without sampling noise (uptake constant in the window) cannot exceed by chance.
    live = np.diag(C) > 0
    n_points = int(ok.size)
    if not live.any():
        return NullSup(np.zeros(0), n_points)
    C = C[np.ix_(live, live)]
    d = np.sqrt(np.diag(C))
    R = C / d[:, None] / d[None, :]
    B = _root(R)
    rng = np.random.default_rng(seed)
    sup = np.empty(draws)
    Bt = B.T.astype(np.float32)          # single precision: ample for a quantile, twice as fast
    for a in range(0, draws, 500):
        xi = rng.standard_normal((min(500, draws - a), B.shape[1]), dtype=np.float32)
        sup[a:a + xi.shape[0]] = np.abs(xi @ Bt).max(axis=1)
    return NullSup(np.sort(sup), n_points)


@dataclass(frozen=True)
class BiasBound:
    """Worst-case smoothing bias of a local linear jump under |μ''| ≤ M on each side."""

    bound: float             # B̄ = (M/2)·Σ_i |ℓ_i| u_i²
    curvature: float         # M, the upper bound on |μ''| of the quadratic pilots (curvature_bound)
    weight_sum: float        # Σ_i |ℓ_i| u_i²

    def p_value(self, jump: float, se: float) -> float:
        """Two-sided p-value of "no jump" allowing a bias up to B̄: P(|N(b, 1)| ≥ |t|), b = B̄/se."""
        if not (np.isfinite(jump) and np.isfinite(se) and se > 0 and np.isfinite(self.bound)):
            return float("nan")
        t, b = abs(jump) / se, self.bound / se
        return float(min(1.0, sps.norm.sf(t - b) + sps.norm.sf(t + b)))


def bias_bound(stats: BinnedStats, column: str, cutoff: float, bandwidth: float,
               kernel: str = "triangular", right_closed: bool = True) -> BiasBound:
    """Bias bound of the local linear jump at ``cutoff`` with bandwidth ``bandwidth``.

    Parameters
    ----------
    stats : BinnedStats (the held-out half for a discovered cutoff).
    column : treatment column; cutoff, bandwidth : running-variable units.

    Returns
    -------
    BiasBound; ``bound`` is in the units of ``column`` (uptake share for a treatment).

    Notes
    -----
    Bounded-second-derivative class of Kolesár & Rothe (2018, AER 108(8)) and Armstrong &
    Kolesár (2020, QE 11(1)): |bias| ≤ (M/2)·Σ|ℓ_i|u_i² for a linear estimator Σℓ_i y_i that
    reproduces lines on each side.  M is the larger over the two sides of |μ̂''| + z·se(μ̂''), the
    upper end of a one-sided 80% interval (:func:`scanner.estimate.honest.curvature_bound`, HC3
    sandwich), from a quadratic fitted on each side over twice the bandwidth (their rule of
    thumb uses a global quartic, from memory; its second derivative is too noisy at the
    window's edge to bound a search).  A point estimate of |μ''| is below the truth about half
    the time, and a search seeks out exactly the places where it is.  A curved but smooth uptake
    on a coarse support otherwise looks like a jump to a local linear fit.
    """
    _, x, n, _, _ = _bins(stats, column)
    h = float(bandwidth)
    K = kernel_fn(kernel)
    u = x - cutoff
    right = (u >= 0) if right_closed else (u > 0)
    wsum = 0.0
    for side in (~right, right):
        w = K(u[side] / h)
        inside = w > 0
        if inside.sum() < 2:
            return BiasBound(float("nan"), float("nan"), float("nan"))
        us, ns, ws = u[side][inside], n[side][inside], w[inside]
        S0, S1, S2 = (ws * ns).sum(), (ws * ns * us).sum(), (ws * ns * us * us).sum()
        det = S0 * S2 - S1 * S1
        ell = ws * (S2 - S1 * us) / det
        wsum += float((ns * np.abs(ell) * us * us).sum())
    # Curvature pilot: a quadratic on each side over twice the bandwidth (as in the
    # second-derivative step of Imbens & Kalyanaraman 2012), taken at the upper end of a
    # one-sided interval for its |μ''| (curvature_bound), so pilot noise widens the allowance.
    M = curvature_bound(side_data(stats, column, cutoff, right_closed), window=2 * h,
                        kernel="uniform", both=True)
    # A side without three support values within 2h: its curvature cannot be bounded from the
    # data (the other side's says nothing about it), so neither can the bias (NaN; the search
    # step then reports no test).
    curv = float(M) if np.isfinite(M) else float("nan")
    return BiasBound(0.5 * curv * wsum, curv, wsum)
