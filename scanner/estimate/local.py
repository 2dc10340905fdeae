"""Local polynomial jumps at a cutoff, computed from bin sums.

Sharp design: the jump is the difference of two one-sided weighted polynomial intercepts at the
cutoff (Hahn, Todd & van der Klaauw 2001, Econometrica 69(1)), local linear with a triangular
kernel by default.  This equals the coefficient on the side indicator in the pooled WLS
``y ~ 1 + D + x + D·x`` (degree 1) with kernel weights.

Variance: heteroskedasticity-robust sandwich (White 1980) with the HC1 finite-sample scaling
``n_h / (n_h - 2(p+1))``, where ``n_h`` is the number of rows with positive kernel weight and
``2(p+1)`` the number of coefficients of the pooled regression — the same scaling statsmodels
applies for ``cov_type="HC1"``.  Within an exact-support bin every row has the same x, so the
row residuals' squares sum to ``Σ(y - ȳ_b)² + n_b (ȳ_b - f(x_b))²``; the sandwich is then exact.

Sides without variation: when every row on a side of the window has the same value (uptake 0
or 1 throughout), that side's residuals are all zero and the sandwich variance collapses, so a
rounding-error "jump" of 1e-16 could get a t of 20.  :func:`floor_variance` gives such a side a
per-row variance that cannot vanish (see its docstring), both sides constant and equal are "no
variation" (no test at all), and :func:`_finish` never lets a standard error fall below
``SE_FLOOR_REL`` times the scale of the fitted levels (a numerical floor, our choice).

Fuzzy design: the ratio of the outcome jump to the uptake jump (a local Wald estimator), with
the delta-method variance ``Σ ℓ_i² (e_Y,i − τ e_T,i)² / τ_T²`` — numerically the HC sandwich of
the just-identified weighted two-stage least squares with instrument D.
"""
from __future__ import annotations

from dataclasses import dataclass, asdict

import numpy as np
from scipy import special

from ..bins import BinnedStats
from .kernels import kernel as kernel_fn

Z95 = float(special.ndtri(0.975))
SE_FLOOR_REL = 1e-8      # our choice: far below any real SE, far above rounding error of sums
AC_PSEUDO = 2.0          # Agresti & Coull (1998): add 2 successes and 2 failures (95% level)
CONST_TOL = 1e-12        # relative tolerance for "every row has the same value"


@dataclass(frozen=True)
class SideData:
    """Bins of one column around a cutoff: centred x, counts and sums; ``right`` marks the right side.

    ``s1``/``s2`` may also be 2-D (bins × columns) for several columns present on the same rows
    of every bin (same counts ``n``): see :func:`side_data_many` and :func:`fit_jumps`.
    """

    u: np.ndarray
    n: np.ndarray
    s1: np.ndarray
    s2: np.ndarray
    right: np.ndarray


def side_data(stats: BinnedStats, column: str, cutoff: float, right_closed: bool = True) -> SideData:
    """Collapse period/half keys and return the column's bins centred at ``cutoff``.

    ``right_closed`` puts rows exactly at the cutoff on the right (x ≥ c); otherwise on the left.
    """
    st = stats.pooled()
    x, n, s1, s2 = st.column_sums(column)
    keep, u, right = _centre(x, n, cutoff, right_closed)
    return SideData(u, n[keep], s1[keep], s2[keep], right)


def _centre(x, n, cutoff, right_closed):
    """Occupied bins, their x centred at ``cutoff``, and which of them lie on the right."""
    keep = n > 0
    u = x[keep] - cutoff
    return keep, u, (u >= 0 if right_closed else u > 0)


def side_data_many(stats: BinnedStats, columns, cutoff: float,
                   right_closed: bool = True) -> list[tuple[list[str], SideData]]:
    """Columns grouped by their per-bin counts, each group as one SideData with 2-D sums.

    Columns present on the same rows of every bin (equal counts) share the bins, the kernel
    weights and the weighted design, so :func:`fit_jumps` fits them in one solve.  Groups keep
    the order of ``columns``.
    """
    st = stats.pooled()
    groups: list[tuple[list[str], np.ndarray]] = []
    for name in columns:
        n = st.cnt[:, st.col(name)]
        for names, n0 in groups:
            if np.array_equal(n, n0):
                names.append(name)
                break
        else:
            groups.append(([name], n))
    out = []
    for names, n in groups:
        keep, u, right = _centre(st.x, n, cutoff, right_closed)
        idx = [st.col(c) for c in names]
        out.append((names, SideData(u, n[keep].astype(float), st.s1[keep][:, idx],
                                    st.s2[keep][:, idx], right)))
    return out


@dataclass(frozen=True)
class JumpFit:
    """A one-cutoff local polynomial fit. NaN estimates come with a ``reason``."""

    cutoff: float
    bandwidth: float
    kernel: str
    degree: int
    jump: float
    se: float
    z: float
    p_value: float
    ci_low: float
    ci_high: float
    left: float
    right: float
    slope_left: float
    slope_right: float
    n_left: int
    n_right: int
    distinct_left: int
    distinct_right: int
    reason: str | None = None

    def to_dict(self) -> dict:
        return asdict(self)


def powers(u, degree):
    """Columns 1, u, …, u^degree: ``np.vander(u, degree + 1, increasing=True)``, same values.

    Built by repeated multiplication as np.vander does, without its overhead (this runs tens of
    thousands of times per scan).
    """
    R = np.empty((u.size, degree + 1))
    R[:, 0] = 1.0
    if degree >= 1:
        R[:, 1] = u
    for j in range(2, degree + 1):
        R[:, j] = R[:, j - 1] * u
    return R


def _side_design(u, n, w, degree):
    """Design ``R`` and inverse weighted moment matrix ``(R'WR)⁻¹`` of one side's bins.

    They depend on the bins, counts and kernel weights only, so columns present on the same
    rows share them (:func:`fit_jumps`).
    """
    R = powers(u, degree)
    A = (R * (w * n)[:, None]).T @ R
    return R, np.linalg.inv(A)


def _side_fit(u, n, s1, s2, w, degree, design=None):
    """Weighted polynomial fit on one side from bins; returns (beta, Ainv, R, fitted).

    ``design`` is ``_side_design(u, n, w, degree)`` when already at hand.
    """
    R, Ainv = design if design is not None else _side_design(u, n, w, degree)
    beta = Ainv @ (R.T @ (w * s1))
    return beta, Ainv, R, R @ beta


def _intercept_var(R, Ainv, w, rss):
    """Sandwich variance of the intercept, ``(A⁻¹ R'diag(w²·rss)R A⁻¹)[0, 0]``."""
    meat = (R * (w ** 2 * rss)[:, None]).T @ R
    return (Ainv @ meat @ Ainv)[0, 0]


def _rss(n, s1, s2, fitted):
    """Σ (y_i − f_b)² per bin, computed about the bin mean for numerical stability."""
    mean = s1 / n
    within = np.maximum(s2 - s1 * mean, 0.0)
    return within + n * (mean - fitted) ** 2


def _not_estimable(cutoff, h, kern, degree, reason, nl=0, nr=0, dl=0, dr=0) -> JumpFit:
    nan = float("nan")
    return JumpFit(cutoff, h, kern, degree, nan, nan, nan, nan, nan, nan, nan, nan, nan, nan,
                   int(nl), int(nr), int(dl), int(dr), reason)


def _windows(data: SideData, h, kern, degree, h_right=None):
    """Kernel weights and side masks; ``h_right`` (optional) is a separate right-side bandwidth."""
    K = kernel_fn(kern)
    hr = h if h_right is None else h_right
    if h > 0 and hr > 0:
        w = K(data.u / h) if hr == h else np.where(data.right, K(data.u / hr), K(data.u / h))
    else:
        w = np.zeros_like(data.u)
    inside = w > 0
    L = inside & ~data.right
    Rm = inside & data.right
    return w, L, Rm


def _support(L, Rm, data):
    """Rows and distinct values inside the window on each side: (n_left, n_right, d_left, d_right)."""
    return int(data.n[L].sum()), int(data.n[Rm].sum()), int(L.sum()), int(Rm.sum())


def _check_support(cutoff, h, kern, degree, counts):
    nl, nr, dl, dr = counts
    if not (np.isfinite(h) and h > 0):
        return _not_estimable(cutoff, h, kern, degree, "no usable bandwidth", nl, nr, dl, dr)
    if dl == 0 or dr == 0:
        side = "left" if dl == 0 else "right"
        return _not_estimable(cutoff, h, kern, degree, f"no data on the {side} of the cutoff "
                              "within the bandwidth", nl, nr, dl, dr)
    if min(dl, dr) < degree + 1:
        return _not_estimable(cutoff, h, kern, degree, f"fewer than {degree + 1} distinct values "
                              "on a side within the bandwidth", nl, nr, dl, dr)
    return None


def fit_jump(stats: BinnedStats, column: str, cutoff: float, bandwidth: float,
             kernel: str = "triangular", degree: int = 1, right_closed: bool = True,
             data: SideData | None = None, bandwidth_right: float | None = None) -> JumpFit:
    """Local polynomial estimate of the jump in E[column | x] at ``cutoff``.

    Parameters
    ----------
    stats : BinnedStats of the running variable.
    column : tracked column (a treatment for the first stage, or a covariate/outcome).
    cutoff : cutoff on the running variable's own scale.
    bandwidth : half-width h of the window c − h < x < c + h (running-variable units).
    kernel : 'triangular' (default), 'epanechnikov' or 'uniform'.
    degree : polynomial degree on each side (0, 1 or 2).
    right_closed : rows at x == cutoff belong to the right side (x ≥ c) when True.
    data : the column's SideData when already at hand (then ``stats`` and ``column`` are unused).
    bandwidth_right : optional separate bandwidth on the right (then ``bandwidth`` is the left one).

    Returns
    -------
    JumpFit with the jump (right limit − left limit), its HC1 sandwich SE, normal CI and p-value.

    Notes
    -----
    Hahn, Todd & van der Klaauw (2001); sandwich variance White (1980) with HC1 scaling.
    """
    d = data if data is not None else side_data(stats, column, cutoff, right_closed)
    return fit_jumps(d, cutoff, bandwidth, kernel, degree, bandwidth_right)[0]


def fit_jumps(data: SideData, cutoff: float, bandwidth: float, kernel: str = "triangular",
              degree: int = 1, bandwidth_right: float | None = None) -> list[JumpFit]:
    """:func:`fit_jump` for every column of ``data`` (2-D sums: columns sharing the counts).

    The kernel weights, the weighted design and its inverse depend only on the bins and counts,
    so they are formed once per side and applied to all columns; each column's numbers are the
    ones :func:`fit_jump` gives for it alone.

    Returns
    -------
    list of JumpFit, one per column (one for 1-D sums).

    Notes
    -----
    Hahn, Todd & van der Klaauw (2001); sandwich variance White (1980) with HC1 scaling.
    """
    d = data
    k0 = d.s1.shape[1] if d.s1.ndim == 2 else 1     # explicit: a column with no rows has u.size 0
    S1 = d.s1.reshape(d.u.size, k0)
    S2 = d.s2.reshape(d.u.size, k0)
    h = float(bandwidth)
    w, L, Rm = _windows(d, h, kernel, degree, bandwidth_right)
    counts = _support(L, Rm, d)
    bad = _check_support(cutoff, min(h, bandwidth_right or h), kernel, degree, counts)
    k = S1.shape[1]
    if bad:
        return [bad] * k
    try:
        sides = [(d.u[m], d.n[m], w[m], S1[m], S2[m]) for m in (L, Rm)]
        designs = [_side_design(u, n, wm, degree) for u, n, wm, _, _ in sides]
    except np.linalg.LinAlgError:
        nl, nr, dl, dr = counts
        return [_not_estimable(cutoff, h, kernel, degree, "singular local fit",
                               nl, nr, dl, dr)] * k
    n_h = float(d.n[L].sum() + d.n[Rm].sum())
    scale = n_h / (n_h - 2 * (degree + 1)) if n_h > 2 * (degree + 1) else float("nan")
    out = []
    for j in range(k):
        # One column at a time through the shared designs: the same operations, in the same
        # order, as a fit of that column alone (batched BLAS calls would round differently).
        parts = []
        for (u, n, wm, s1, s2), design in zip(sides, designs):
            beta, Ainv, R, fit = _side_fit(u, n, s1[:, j], s2[:, j], wm, degree, design)
            parts.append((beta, _intercept_var(R, Ainv, wm, _rss(n, s1[:, j], s2[:, j], fit))))
        (bl, vl), (br, vr) = parts
        se = float(np.sqrt((vl + vr) * scale))
        out.append(_finish(cutoff, h, kernel, degree, br[0] - bl[0], se, bl, br, counts))
    return out


def two_sided_p(z: float) -> float:
    """``2·(1 − Φ(|z|))`` via scipy.special.ndtr (what scipy.stats.norm.sf computes, without
    the distribution machinery's per-call overhead)."""
    return float(2 * special.ndtr(-abs(z)))


def se_floor(*levels) -> float:
    """Smallest standard error we report for estimates of levels like ``levels``.

    Sums of n values of size s carry rounding errors near n·1e-16·s, so an SE below
    ``SE_FLOOR_REL`` × the scale of the fitted levels is numerical noise, not precision.
    """
    scale = max((abs(float(v)) for v in levels if np.isfinite(v)), default=0.0)
    return SE_FLOOR_REL * scale


def _finish(cutoff, h, kern, degree, jump, se, bl, br, counts) -> JumpFit:
    if not np.isfinite(se):
        # HC1 needs more rows than coefficients (n > 2(p + 1)): with fewer there is an estimate
        # but no standard error, and no test — never a p-value of 0.
        return _not_estimable(cutoff, h, kern, degree, "too few rows in the window for a "
                              "standard error", *counts)
    se = max(float(se), se_floor(bl[0], br[0]))
    z = jump / se if se > 0 else (float(np.copysign(np.inf, jump)) if jump != 0 else float("nan"))
    p = two_sided_p(z) if np.isfinite(z) else (0.0 if np.isinf(z) else float("nan"))
    sl = bl[1] if degree >= 1 else 0.0
    sr = br[1] if degree >= 1 else 0.0
    return JumpFit(float(cutoff), h, kern, degree, float(jump), se, float(z), p,
                   float(jump - Z95 * se), float(jump + Z95 * se), float(bl[0]), float(br[0]),
                   float(sl), float(sr), *counts)


@dataclass(frozen=True)
class Variation:
    """Which sides of a window have no within-side variation, and the variance used instead.

    ``method`` names the variance given to a constant side (None when no side is constant);
    ``none`` is True when both sides are constant at the same value: there is nothing to test.
    """

    constant_left: bool
    constant_right: bool
    value_left: float
    value_right: float
    binary: bool
    method: str | None = None
    variance_left: float = float("nan")
    variance_right: float = float("nan")

    @property
    def none(self) -> bool:
        return (self.constant_left and self.constant_right
                and abs(self.value_left - self.value_right)
                <= CONST_TOL * max(1.0, abs(self.value_left)))

    def to_dict(self) -> dict:
        return {**asdict(self), "none": self.none}


def is_binary(d: SideData) -> bool:
    """Every row 0 or 1: then Σy² = Σy in every bin and 0 ≤ Σy ≤ n.

    Decide this on the raw data only: :func:`floor_variance` raises Σy² on a constant side, so
    floored data of a 0/1 column no longer pass (use ``Variation.binary`` then).
    """
    n, s1, s2 = d.n, d.s1, d.s2
    return bool(np.all(s1 >= -CONST_TOL * n) and np.all(s1 <= n * (1 + CONST_TOL))
                and np.all(np.abs(s2 - s1) <= CONST_TOL * np.maximum(n, 1)))


def _constant(n, s1, s2):
    """(constant?, value) of the rows in these bins: one mean and no spread within bins."""
    if n.sum() <= 0:
        return False, float("nan")
    mean = s1 / n
    v = float(s1.sum() / n.sum())
    tol = CONST_TOL * max(1.0, abs(v))
    within = s2 - s1 * mean
    return bool(np.all(np.abs(mean - v) <= tol) and np.all(within <= tol * tol * n + tol * n)), v


def floor_variance(d: SideData, h_left: float, h_right: float | None = None):
    """The side data with a non-vanishing variance on any side that has no variation.

    Parameters
    ----------
    d : SideData of one column at the cutoff.
    h_left, h_right : the bandwidths on each side (``h_right`` defaults to ``h_left``); a side
        is constant when every row with |x − c| < h on it has the same value.

    Returns
    -------
    (SideData, Variation).  Only the second moments of the constant side's bins inside its
    window change (``s2`` = ``s1²/n + n σ̃²``), so every estimate is unchanged and every
    variance built from residuals sees a per-row variance σ̃² there:

    * 0/1 column: σ̃² = p̃(1 − p̃) with p̃ = (Σy + 2)/(n + 4), the Bernoulli variance at the
      Agresti–Coull share of that side's n rows in the window (Agresti & Coull 1998, The
      American Statistician 52(2): 119–126, from memory): 0 successes in n rows still carry
      the uncertainty of a share near 2/(n + 4).
    * other columns: σ̃² = the other side's sample variance within its window (a pooled
      variance; conservative, as it also holds the other side's trend).
    * other columns constant on both sides at different values: no floor (the data are
      deterministic); only the numerical floor of :func:`se_floor` applies.

    Notes
    -----
    METHODS.md §8e asks for a variance that cannot vanish where uptake is 0 or 1 throughout a
    side; the Agresti–Coull share is the floor we chose for 0/1 columns.
    """
    hr = h_left if h_right is None else h_right
    nan = float("nan")
    binary = is_binary(d)
    if not (np.isfinite(h_left) and np.isfinite(hr) and h_left > 0 and hr > 0):
        return d, Variation(False, False, nan, nan, binary)
    masks = [(~d.right) & (np.abs(d.u) < h_left) & (d.n > 0),
             d.right & (np.abs(d.u) < hr) & (d.n > 0)]
    const = [_constant(d.n[m], d.s1[m], d.s2[m]) for m in masks]
    (cl, vl), (cr, vr) = const
    if not (cl or cr):
        return d, Variation(False, False, vl, vr, binary)
    var = [nan, nan]
    method = None
    for i, (m, (c, v)) in enumerate(zip(masks, const)):
        if not c:
            continue
        n = float(d.n[m].sum())
        if binary:
            pt = (float(d.s1[m].sum()) + AC_PSEUDO) / (n + 2 * AC_PSEUDO)
            var[i] = pt * (1 - pt)
            method = "Bernoulli variance at the Agresti-Coull share (Agresti & Coull 1998)"
        else:
            o = masks[1 - i]
            no = float(d.n[o].sum())
            if const[1 - i][0] or no < 2:
                continue
            s1o, s2o = float(d.s1[o].sum()), float(d.s2[o].sum())
            var[i] = max(s2o - s1o * s1o / no, 0.0) / (no - 1)
            method = "the other side's variance within the bandwidth (pooled)"
    s2 = d.s2.astype(float).copy()
    for m, v in zip(masks, var):
        if np.isfinite(v) and v > 0:
            s2[m] = d.s1[m] ** 2 / d.n[m] + d.n[m] * v
    out = SideData(d.u, d.n, d.s1, s2, d.right) if method else d
    return out, Variation(cl, cr, vl, vr, binary, method, var[0], var[1])


def joint_side_data(stats: BinnedStats, treatment: str, outcome: str, cutoff: float,
                    right_closed: bool = True):
    """SideData of treatment and outcome over rows where both are present, and Σ T·Y per bin."""
    st = stats.pooled()
    q = st.pair(treatment, outcome)
    n = st.pn[:, q].astype(float)
    keep = n > 0
    u = st.x[keep] - cutoff
    right = u >= 0 if right_closed else u > 0
    dT = SideData(u, n[keep], st.pa[keep, q], st.paa[keep, q], right)
    dY = SideData(u, n[keep], st.pb[keep, q], st.pbb[keep, q], right)
    return dT, dY, st.pab[keep, q]


@dataclass(frozen=True)
class FuzzyFit:
    """A fuzzy RD estimate: reduced form / first stage with its delta-method SE."""

    effect: float
    se: float
    ci_low: float
    ci_high: float
    p_value: float
    first_stage: JumpFit
    reduced_form: JumpFit
    reason: str | None = None


def fit_fuzzy(stats: BinnedStats, treatment: str, outcome: str, cutoff: float, bandwidth: float,
              kernel: str = "triangular", degree: int = 1, right_closed: bool = True) -> FuzzyFit:
    """Fuzzy RD effect of ``treatment`` on ``outcome`` at ``cutoff`` (local Wald ratio).

    Uses the joint sums of the (treatment, outcome) pair, i.e. rows where both are present, and
    one bandwidth for numerator and denominator.

    Notes
    -----
    Hahn, Todd & van der Klaauw (2001) for the ratio; the variance is the delta method
    ``V = Σ ℓ_i² (e_Y,i − τ e_T,i)² / τ_T²`` with HC1 scaling, identical to the HC1 sandwich of
    weighted 2SLS with controls (1, x, D·x), endogenous T and excluded instrument D.
    """
    st = stats.pooled()
    dT, dY, sab = joint_side_data(st, treatment, outcome, cutoff, right_closed)
    u, n, sa, saa, sb, sbb = dT.u, dT.n, dT.s1, dT.s2, dY.s1, dY.s2
    fs = fit_jump(st, treatment, cutoff, bandwidth, kernel, degree, right_closed, data=dT)
    rf = fit_jump(st, outcome, cutoff, bandwidth, kernel, degree, right_closed, data=dY)
    nan = float("nan")
    if fs.reason or rf.reason:
        return FuzzyFit(nan, nan, nan, nan, nan, fs, rf, fs.reason or rf.reason)
    if fs.jump == 0:
        return FuzzyFit(nan, nan, nan, nan, nan, fs, rf, "no first-stage jump")
    tau = rf.jump / fs.jump
    w, L, Rm = _windows(dT, float(bandwidth), kernel, degree)
    var = 0.0
    for m in (L, Rm):
        _, Ainv, R, fit_t = _side_fit(u[m], n[m], sa[m], saa[m], w[m], degree)
        beta_y = Ainv @ (R.T @ (w[m] * sb[m]))
        g = R @ beta_y - tau * fit_t
        sz = sb[m] - tau * sa[m]
        szz = sbb[m] - 2 * tau * sab[m] + tau * tau * saa[m]
        rss = _rss(n[m], sz, szz, g)
        meat = (R * (w[m] ** 2 * rss)[:, None]).T @ R
        var += (Ainv @ meat @ Ainv)[0, 0]
    n_h = float(n[L].sum() + n[Rm].sum())
    k = 2 * (degree + 1)
    var *= n_h / (n_h - k) if n_h > k else nan
    se = float(np.sqrt(var) / abs(fs.jump))
    p = two_sided_p(tau / se) if se > 0 else nan
    return FuzzyFit(float(tau), se, tau - Z95 * se, tau + Z95 * se, p, fs, rf)
