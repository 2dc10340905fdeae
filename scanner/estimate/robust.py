"""Robust bias-corrected and bias-aware ("honest") intervals for a jump, from bin sums.

Every estimate here is linear in the outcome: per bin ``b`` a weight ``ℓ_b`` applies to each of
the ``n_b`` rows, so the estimate is ``Σ_b ℓ_b Σy_b`` and its sandwich variance is
``Σ_b ℓ_b² Σ_{i∈b} e_i²`` with the residual sums taken about the bin mean (``local._rss``).  With
exact-support bins these equal the row-level computations to floating-point precision.

Robust bias correction (Calonico, Cattaneo & Titiunik 2014, Econometrica 82(6)): the local
polynomial of order p with bandwidth h has leading bias ``κ_s β_{p+1,s}`` on side s, where
``κ_s = e0'(Z'WZ)⁻¹Z'W u^{p+1}`` (kernel and h of the main fit) is the intercept shift a ``u^{p+1}``
term would cause, and ``β_{p+1,s}`` is the ``u^{p+1}`` coefficient of a local polynomial of order
q = p + 1 with pilot bandwidth b.  The bias-corrected weights are ``ℓ − κ m`` (m the weights
giving ``β_{p+1}``); the robust variance uses them with residuals from the order-q fit, so with
b = h the corrected estimate is exactly the local quadratic one and the robust variance its
sandwich (METHODS.md §3 item 6; checked in tests/test_inference.py).  The default variance is
HC3 (squared residuals over (1 − leverage)², exact on exact bins because every row of a bin has
the same leverage): in the CCT designs HC1 undercovered (robust coverage ≈ 0.90, see
docs/methods.md).  HC1 scales by ``n/(n − 2(q+1))`` (robust) and ``n/(n − 2(p+1))``
(conventional), as statsmodels does for the pooled regressions.

Bias-aware intervals are in ``honest.py`` (re-exported here).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, asdict

import numpy as np

from .kernels import kernel as kernel_fn
from .local import SideData, _rss, Z95, powers


def _pair(v):
    """(left, right) from a number or a pair."""
    if isinstance(v, (tuple, list)):
        return float(v[0]), float(v[1])
    return float(v), float(v)


def coef_weights(u, n, w, degree):
    """Rows of ``(R'WR)⁻¹R'W`` per bin: ``coef_k = Σ_b L[k, b] Σy_b``; also the design R.

    Raises numpy.linalg.LinAlgError when the weighted design is singular.
    """
    R = powers(u, degree)
    A = (R * (w * n)[:, None]).T @ R
    L = np.linalg.solve(A, (R * w[:, None]).T)
    return L, R


@dataclass(frozen=True)
class SideOperator:
    """Linear operators of one side: conventional and bias-corrected intercept weights per bin.

    ``lp`` and ``lbc`` are per-row weights of every bin of the side (zero outside the windows);
    ``Lq``/``Rq`` give the order-q fit (``Rq @ (Lq @ s1)``) whose residuals enter the robust variance.
    """

    lp: np.ndarray
    lbc: np.ndarray
    kappa: float
    mq: np.ndarray
    Lp: np.ndarray
    Rp: np.ndarray
    Lq: np.ndarray
    Rq: np.ndarray
    in_p: np.ndarray
    in_rob: np.ndarray


def side_operator(u, n, h, b, kern, p=1) -> SideOperator:
    """Weights of one side (``u`` already restricted to that side) for bandwidths h and b."""
    K = kernel_fn(kern)
    q = p + 1
    wh, wb = K(u / h), K(u / b)
    mh, mb = wh > 0, wb > 0
    Lp, Rp = coef_weights(u[mh], n[mh], wh[mh], p)
    Lq, Rq = coef_weights(u[mb], n[mb], wb[mb], q)
    lp = np.zeros(u.size)
    lp[mh] = Lp[0]
    mq = np.zeros(u.size)
    mq[mb] = Lq[p + 1]
    kappa = float((lp * n * u ** (p + 1)).sum())
    lbc = lp - kappa * mq
    Lpf = np.zeros((p + 1, u.size))
    Lpf[:, mh] = Lp
    Lqf = np.zeros((q + 1, u.size))
    Lqf[:, mb] = Lq
    Rq = powers(u, q)
    return SideOperator(lp, lbc, kappa, mq, Lpf, Rq[:, : p + 1], Lqf, Rq, mh, mh | mb)


def _hc1(nrows, k):
    return nrows / (nrows - k) if nrows > k else float("nan")


VCE = ("hc3", "hc1", "hc2", "nn")   # hc3 is the default everywhere
NN_J = 3   # neighbours, as in CCT (2014, supplement) [MEMORY]


def nn_sums(u, n, s1, s2, J: int = NN_J) -> np.ndarray:
    """Per bin, an estimate of Σ_{i∈b} σ²(x_i) from the nearest rows on the same side.

    Each bin is grouped with its nearest neighbouring bins (a symmetric run of bins, cut at the
    side's ends) until the group holds at least J + 1 rows; ``n_b`` times the group's sample
    variance estimates the bin's total conditional variance.  ``_sig`` applies it to residuals
    of the fit, so a steep mean inside a group does not pass for noise.

    Notes
    -----
    Nearest-neighbour variance estimation as used by Calonico, Cattaneo & Titiunik (2014,
    supplement; J = 3 neighbours, recalled from memory), adapted to bins.
    """
    m = u.size
    order = np.argsort(u, kind="stable")
    cn = np.r_[0.0, np.cumsum(n[order])]
    c1 = np.r_[0.0, np.cumsum(s1[order])]
    c2 = np.r_[0.0, np.cumsum(s2[order])]
    idx = np.arange(m)
    k = np.zeros(m, int)
    for _ in range(m):
        lo, hi = np.maximum(idx - k, 0), np.minimum(idx + k, m - 1) + 1
        short = (cn[hi] - cn[lo]) < J + 1
        if not short.any() or k.max() >= m:
            break
        k[short] += 1
    lo, hi = np.maximum(idx - k, 0), np.minimum(idx + k, m - 1) + 1
    gn, g1, g2 = cn[hi] - cn[lo], c1[hi] - c1[lo], c2[hi] - c2[lo]
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.where(gn > 1, np.maximum(g2 - g1 * g1 / gn, 0.0) / (gn - 1), 0.0)
    out = np.empty(m)
    out[order] = n[order] * var
    return out


def _sig(vce, u, n, s1, s2, L, R):
    """Per-bin Σ σ̂² for the fit ``R @ (L @ s1)``.

    'hc1'/'hc2'/'hc3': squared residuals, divided by ``(1 − leverage)^k`` for k = 0, 1, 2 (every
    row of a bin has the same leverage ``r_b' A⁻¹ r_b w_b``, so this is exact on exact bins);
    'nn': nearest-neighbour sums (:func:`nn_sums`).
    """
    if vce == "nn":
        # Neighbour variance of the residuals, so a steep mean does not pass for noise.
        f = R @ (L @ s1)
        return nn_sums(u, n, s1 - n * f, s2 - 2 * f * s1 + n * f * f)
    if vce not in VCE:
        raise ValueError(f"variance estimator '{vce}' is unknown; choose one of {', '.join(VCE)}")
    rss = _rss(n, s1, s2, R @ (L @ s1))
    if vce == "hc1":
        return rss
    lev = np.clip((R * L.T).sum(axis=1), 0.0, 1.0 - 1e-12)
    return rss / (1.0 - lev) ** (1 if vce == "hc2" else 2)


def _scale(vce, nrows, k):
    # HC1's degrees-of-freedom factor; HC2/HC3 correct through the leverage instead.
    return _hc1(nrows, k) if vce == "hc1" else 1.0


@dataclass(frozen=True)
class RobustFit:
    """Conventional and robust bias-corrected estimates of one jump (NaN with a ``reason``)."""

    jump: float
    se: float
    ci_low_conventional: float
    ci_high_conventional: float
    jump_bc: float
    se_robust: float
    ci_low: float
    ci_high: float
    z_robust: float
    p_value: float
    h_left: float
    h_right: float
    b_left: float
    b_right: float
    reason: str | None = None

    def to_dict(self) -> dict:
        return asdict(self)


def _nan_fit(h, b, reason) -> RobustFit:
    nan = float("nan")
    return RobustFit(nan, nan, nan, nan, nan, nan, nan, nan, nan, nan, *h, *b, reason)


def _operators(d: SideData, h, b, kern, p):
    """Left and right operators, or a reason string when a side cannot be fitted."""
    hl, hr = _pair(h)
    bl, br = _pair(b)
    if not all(np.isfinite(v) and v > 0 for v in (hl, hr, bl, br)):
        return "no usable bandwidth"
    ops = []
    for side, hs, bs in ((~d.right, hl, bl), (d.right, hr, br)):
        u = d.u[side]
        if (np.abs(u) < hs).sum() < p + 1 or (np.abs(u) < bs).sum() < p + 2:
            return f"fewer than {p + 2} distinct values on a side within the bandwidths"
        try:
            ops.append(side_operator(u, d.n[side], hs, bs, kern, p))
        except np.linalg.LinAlgError:
            return "singular local fit"
    return ops


def _pvalue(z):
    # erfc(|z|/√2) = 2·(1 − Φ(|z|)); math is much cheaper than a scipy call per candidate.
    return math.erfc(abs(z) / math.sqrt(2)) if np.isfinite(z) else float("nan")


def _window(d: SideData, reach_: float, *extra):
    """Only the bins any fit can use (|u| < the largest bandwidth); ``extra`` arrays alike."""
    m = np.abs(d.u) < reach_
    if m.all():
        return (d, *extra)
    return (SideData(d.u[m], d.n[m], d.s1[m], d.s2[m], d.right[m]), *[e[m] for e in extra])


def _finish(conv, se, bc, se_rob, h, b) -> RobustFit:
    z = bc / se_rob if se_rob > 0 else float("nan")
    return RobustFit(float(conv), float(se), float(conv - Z95 * se), float(conv + Z95 * se),
                     float(bc), float(se_rob), float(bc - Z95 * se_rob), float(bc + Z95 * se_rob),
                     float(z), _pvalue(z), *h, *b)


def _side_pieces(d: SideData, ops):
    """Per side (left, then right): the side's operator and its bin mask."""
    for side, op in zip((~d.right, d.right), ops):
        yield op, side


def robust_jump(d: SideData, h, b, kernel: str = "triangular", p: int = 1,
                vce: str = "hc3") -> RobustFit:
    """Conventional and robust bias-corrected (RBC) jump of one column at the cutoff.

    Parameters
    ----------
    d : SideData of the column, centred at the cutoff (``local.side_data``).
    h : main bandwidth (running-variable units); a number or (left, right).
    b : pilot bandwidth of the bias fit; a number or (left, right).
    kernel : kernel name.
    p : order of the main fit (the bias fit has order p + 1).
    vce : 'hc3' (default), 'hc1', 'hc2' or 'nn' (see ``_sig``).  Residuals come from the
        order-p fit at h for the conventional variance and from the order-q fit at b for the
        robust one.

    Returns
    -------
    RobustFit: ``jump``/``se`` conventional, ``jump_bc`` bias-corrected, ``se_robust`` its
    standard error counting the bias estimate's variability; ``ci_low``/``ci_high`` the robust
    95% interval centred on ``jump_bc``; ``p_value`` robust.

    Notes
    -----
    Calonico, Cattaneo & Titiunik (2014), Econometrica 82(6): 2295–2326, with the sample-version
    bias constant (METHODS.md §3 items 2–6).
    """
    hh, bb = _pair(h), _pair(b)
    (d,) = _window(d, max(*hh, *bb))
    ops = _operators(d, h, b, kernel, p)
    if isinstance(ops, str):
        return _nan_fit(hh, bb, ops)
    conv = bc = vp = vq = 0.0
    np_, nq = 0.0, 0.0
    for sign, (op, side) in zip((-1.0, 1.0), _side_pieces(d, ops)):
        n, s1, s2 = d.n[side], d.s1[side], d.s2[side]
        conv += sign * (op.lp @ s1)
        bc += sign * (op.lbc @ s1)
        u = d.u[side]
        vp += (op.lp ** 2 * _sig(vce, u, n, s1, s2, op.Lp, op.Rp))[op.in_p].sum()
        vq += (op.lbc ** 2 * _sig(vce, u, n, s1, s2, op.Lq, op.Rq))[op.in_rob].sum()
        np_ += n[op.in_p].sum()
        nq += n[op.in_rob].sum()
    se = np.sqrt(vp * _scale(vce, np_, 2 * (p + 1)))
    se_rob = np.sqrt(vq * _scale(vce, nq, 2 * (p + 2)))
    return _finish(conv, se, bc, se_rob, hh, bb)


def robust_fuzzy(dT: SideData, dY: SideData, sab: np.ndarray, h, b, kernel: str = "triangular",
                 p: int = 1, vce: str = "hc3") -> RobustFit:
    """Fuzzy RD ratio with conventional and robust bias-corrected intervals.

    Parameters
    ----------
    dT, dY : SideData of the treatment and outcome over rows where both are present (same bins).
    sab : per bin Σ T·Y over those rows.
    h, b, kernel, p, vce : as in :func:`robust_jump`.

    Returns
    -------
    RobustFit on the effect scale: ``jump`` = τ̂_Y/τ̂_T (conventional), ``jump_bc`` =
    τ̂_Y,bc/τ̂_T,bc, each with the delta-method variance ``Σ ℓ² Σ(e_Y − τ e_T)² / τ_T²``.

    Notes
    -----
    Calonico, Cattaneo & Titiunik (2014), fuzzy case: both jumps are bias-corrected and the ratio
    linearised (METHODS.md §1 fuzzy delta method, §3 item 8).
    """
    hh, bb = _pair(h), _pair(b)
    wide = max(*hh, *bb)
    dT, sab = _window(dT, wide, sab)
    (dY,) = _window(dY, wide)
    ops = _operators(dT, h, b, kernel, p)
    if isinstance(ops, str):
        return _nan_fit(hh, bb, ops)
    parts = []
    for op, side in _side_pieces(dT, ops):
        sa, sy = dT.s1[side], dY.s1[side]
        parts.append((op, side, op.lp @ sa, op.lp @ sy, op.lbc @ sa, op.lbc @ sy))
    (_, _, tl, yl, tbl, ybl), (_, _, tr, yr, tbr, ybr) = parts
    fs, rf, fs_bc, rf_bc = tr - tl, yr - yl, tbr - tbl, ybr - ybl
    if fs == 0 or fs_bc == 0:
        return _nan_fit(hh, bb, "no first-stage jump")
    tau, tau_bc = rf / fs, rf_bc / fs_bc
    vp = vq = np_ = nq = 0.0
    for op, side, *_ in parts:
        n = dT.n[side]
        sa, saa, sy, syy, sxy = dT.s1[side], dT.s2[side], dY.s1[side], dY.s2[side], sab[side]
        for w, L, R, t, mask, tgt in ((op.lp, op.Lp, op.Rp, tau, op.in_p, "p"),
                                       (op.lbc, op.Lq, op.Rq, tau_bc, op.in_rob, "q")):
            # Residuals of Y − τT about its fit (linear in the sums, so the fit is L applied to them).
            rss = _sig(vce, dT.u[side], n, sy - t * sa, syy - 2 * t * sxy + t * t * saa, L, R)
            v = (w ** 2 * rss)[mask].sum()
            if tgt == "p":
                vp, np_ = vp + v, np_ + n[mask].sum()
            else:
                vq, nq = vq + v, nq + n[mask].sum()
    se = np.sqrt(vp * _scale(vce, np_, 2 * (p + 1))) / abs(fs)
    se_rob = np.sqrt(vq * _scale(vce, nq, 2 * (p + 2))) / abs(fs_bc)
    return _finish(tau, se, tau_bc, se_rob, hh, bb)


# Bias-aware intervals live in honest.py; re-exported for existing imports.
from .honest import (CURVATURE_Z, M_FACTORS, HonestFit, curvature_bound, honest_best,  # noqa: E402,F401
                     honest_by_M, honest_cv, honest_interval, local_window, side_bias_integral,
                     taylor_bias_bound, worst_case_bias)
