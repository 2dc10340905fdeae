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

Fuzzy design: the ratio of the outcome jump to the uptake jump (a local Wald estimator), with
the delta-method variance ``Σ ℓ_i² (e_Y,i − τ e_T,i)² / τ_T²`` — numerically the HC sandwich of
the just-identified weighted two-stage least squares with instrument D.
"""
from __future__ import annotations

from dataclasses import dataclass, asdict

import numpy as np
from scipy import stats as sps

from ..bins import BinnedStats
from .kernels import kernel as kernel_fn

Z95 = float(sps.norm.ppf(0.975))


@dataclass(frozen=True)
class SideData:
    """Bins of one column around a cutoff: centred x, counts and sums; ``right`` marks the right side."""

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
    keep = n > 0
    u = x[keep] - cutoff
    right = u >= 0 if right_closed else u > 0
    return SideData(u, n[keep], s1[keep], s2[keep], right)


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


def _design(u, degree):
    return np.vander(u, degree + 1, increasing=True)


def _side_fit(u, n, s1, s2, w, degree):
    """Weighted polynomial fit on one side from bins; returns (beta, Ainv, R, fitted)."""
    R = _design(u, degree)
    A = (R * (w * n)[:, None]).T @ R
    b = R.T @ (w * s1)
    Ainv = np.linalg.inv(A)
    beta = Ainv @ b
    return beta, Ainv, R, R @ beta


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
        w = np.where(data.right, K(data.u / hr), K(data.u / h))
    else:
        w = np.zeros_like(data.u)
    inside = w > 0
    L = inside & ~data.right
    Rm = inside & data.right
    return w, L, Rm


def _check_support(cutoff, h, kern, degree, L, Rm, data):
    nl, nr = int(data.n[L].sum()), int(data.n[Rm].sum())
    dl, dr = int(L.sum()), int(Rm.sum())
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
    bandwidth_right : optional separate bandwidth on the right (then ``bandwidth`` is the left one).

    Returns
    -------
    JumpFit with the jump (right limit − left limit), its HC1 sandwich SE, normal CI and p-value.

    Notes
    -----
    Hahn, Todd & van der Klaauw (2001); sandwich variance White (1980) with HC1 scaling.
    """
    d = data if data is not None else side_data(stats, column, cutoff, right_closed)
    h = float(bandwidth)
    w, L, Rm = _windows(d, h, kernel, degree, bandwidth_right)
    bad = _check_support(cutoff, min(h, bandwidth_right or h), kernel, degree, L, Rm, d)
    if bad:
        return bad
    try:
        parts = []
        for m in (L, Rm):
            beta, Ainv, R, fit = _side_fit(d.u[m], d.n[m], d.s1[m], d.s2[m], w[m], degree)
            rss = _rss(d.n[m], d.s1[m], d.s2[m], fit)
            meat = (R * (w[m] ** 2 * rss)[:, None]).T @ R
            parts.append((beta, (Ainv @ meat @ Ainv)[0, 0]))
    except np.linalg.LinAlgError:
        return _not_estimable(cutoff, h, kernel, degree, "singular local fit",
                              d.n[L].sum(), d.n[Rm].sum(), L.sum(), Rm.sum())
    (bl, vl), (br, vr) = parts
    n_h = float(d.n[L].sum() + d.n[Rm].sum())
    k = 2 * (degree + 1)
    scale = n_h / (n_h - k) if n_h > k else float("nan")
    jump = br[0] - bl[0]
    se = float(np.sqrt((vl + vr) * scale))
    return _finish(cutoff, h, kernel, degree, jump, se, bl, br, d, L, Rm)


def _finish(cutoff, h, kern, degree, jump, se, bl, br, d, L, Rm) -> JumpFit:
    z = jump / se if se > 0 else (np.inf if jump != 0 else float("nan"))
    p = float(2 * sps.norm.sf(abs(z))) if np.isfinite(z) else (0.0 if np.isinf(z) else float("nan"))
    sl = bl[1] if degree >= 1 else 0.0
    sr = br[1] if degree >= 1 else 0.0
    return JumpFit(float(cutoff), h, kern, degree, float(jump), se, float(z), p,
                   float(jump - Z95 * se), float(jump + Z95 * se), float(bl[0]), float(br[0]),
                   float(sl), float(sr), int(d.n[L].sum()), int(d.n[Rm].sum()),
                   int(L.sum()), int(Rm.sum()))


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
    p = float(2 * sps.norm.sf(abs(tau / se))) if se > 0 else nan
    return FuzzyFit(float(tau), se, tau - Z95 * se, tau + Z95 * se, p, fs, rf)
