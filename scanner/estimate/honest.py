"""Bias-aware ("honest") fixed-length intervals for a jump, from bin sums.

Armstrong & Kolesár (2018, Econometrica 86(2); 2020, Quantitative Economics 11(1)); Kolesár &
Rothe (2018, AER 108(8)) for the bounded-second-derivative class.  Under ``|μ''| ≤ M`` on each
side, the bias of a linear estimate whose weights reproduce lines on each side is at most
``M Σ_s ∫|G_s(t)| dt`` with ``G_s(t) = Σ_b n_b ℓ_b (|u_b| − t)₊``, and this is attained
(:func:`worst_case_bias`).  The interval is ``τ̂ ± cv(B̄/se)·se`` with ``cv(t)`` the 1 − α quantile
of ``|N(t, 1)|``.  The simpler bound ``(M/2) Σ n|ℓ|u²`` is the worst case over the larger class
that only bounds the Taylor remainder at the cutoff; for triangular local linear weights it is
about 1.9 times the exact value, so intervals built on it were longer than the method gives.

M itself is an assumption; :func:`curvature_bound` takes it from local quadratic fits next to the
cutoff and :func:`honest_by_M` shows the interval at M/2, M and 2M.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from .kernels import kernel as kernel_fn
from .local import SideData
from .robust import _pair, _scale, _sig, coef_weights, powers


def honest_cv(t: float, alpha: float = 0.05) -> float:
    """Critical value: the 1 − α quantile of |N(t, 1)|.

    Notes
    -----
    Armstrong & Kolesár (2020), Quantitative Economics 11(1); |N(t,1)|² is noncentral χ²(1, t²).
    """
    t = abs(float(t))
    if not np.isfinite(t):
        return float("nan")
    if t < 1e-10:
        return float(special.ndtri(1 - alpha / 2))
    if t > 20.0:
        # Φ(−c − t) < Φ(−40) is below double precision, so the quantile solves Φ(c − t) = 1 − α
        # exactly: c = t + Φ⁻¹(1 − α).  (chndtrix returns NaN from t ≈ 3·10^5, which would
        # leave a nearly noiseless fit without an interval.)
        return float(t + special.ndtri(1 - alpha))
    # scipy.stats.ncx2.ppf computes chndtrix; called directly it gives the same values (tested)
    # without the distribution machinery's per-call cost (~0.1 ms, four calls per candidate).
    with np.errstate(over="ignore"):
        return float(np.sqrt(special.chndtrix(1 - alpha, 1, t * t)))


CURVATURE_Z = 0.8416   # one-sided 80% upper bound on the local |μ''| (our choice, see below)
M_FACTORS = (0.5, 1.0, 2.0)   # the bias-aware interval is also reported at these multiples of M


def local_window(d: SideData, need: int = 4) -> float:
    """Default window of the curvature fit: ``1.84·s·N^(-1/5)``, s = ``mse.spread`` (skew-resistant).

    Widened to hold ``need`` support points per side.  The plain standard deviation of a skewed
    running variable (e.g. lognormal) is dominated by its tail and gives windows reaching far
    from the cutoff.
    """
    from .mse import PILOT_C, reach, spread   # lazy: mse → robust → honest is a cycle
    return float(max(PILOT_C * spread(d) * d.n.sum() ** -0.2, reach(d, need)))


def curvature_bound(d: SideData, window=None, z: float = CURVATURE_Z, kernel: str = "triangular",
                    vce: str = "hc3", both: bool = False) -> float:
    """Curvature bound M on |μ''| from local quadratic fits next to the cutoff.

    Each side gets a local quadratic (``kernel``, bandwidth ``window``: a number or (left, right),
    default :func:`local_window`); its second derivative ``μ̂''_s = 2β̂₂`` has the sandwich standard
    error ``se_s`` (``vce`` as in ``robust.robust_jump``).  M is the largest ``|μ̂''_s| + z·se_s``,
    the upper end of a one-sided interval (z = 0.84: 80%), so noise in the pilot makes the
    interval wider rather than shorter.  On the discrete design of benchmarks/coverage_cct.py
    (μ exactly quadratic, so the worst case is attained) z = 0 covered 0.953 in 300 replications
    and z = 0.84 covered 0.977 at a 10% longer interval; z = 1.28 added another 5% length.
    Each side's window is widened to hold four support points where it has them (three fit the
    quadratic exactly and leave no residual for its standard error).  A side with fewer than
    three support points shows no curvature and is skipped (NaN when neither side has three;
    with ``both``, NaN when either side is skipped — a side constant in the window, e.g. uptake
    exactly 0, bends the same way as any other and cannot lend its zero curvature to the other).

    The window stays the bias pilot b.  Widening it to at least :func:`local_window` (a second
    derivative prefers a wider window than a level) was tried: on a lognormal(0, 2) score with
    0.05-wide bins M fell from a median of 2.1 to about 0.8 (true |μ''| 0.23) but coverage stayed
    0.98–0.99 (100 replications), and with 50 rules 20 units apart the window, set by the global
    scale, spanned the neighbouring jumps and the bias-aware coverage fell to 0.951 (25
    replications).  The over-coverage on few bins is kept as the price of a bound that holds.

    Notes
    -----
    Armstrong & Kolesár (2020, Quantitative Economics 11(1)) and Kolesár & Rothe (2018, AER
    108(8)) treat M as an assumption that cannot be learned from the data without further
    assumptions (they suggest a global-polynomial rule of thumb, recalled from memory).  We use the
    curvature near the cutoff instead: a global polynomial is dominated by the bulk of the data,
    and on a skewed running variable it missed the curvature at the cutoff by orders of magnitude.
    Because M stays an assumption, results also carry the interval at M/2 and 2M
    (:func:`honest_by_M`) and the bound used (``honest_bound_M``).
    """
    wl, wr = _pair(window) if window is not None else (float("nan"),) * 2
    if not all(np.isfinite(v) and v > 0 for v in (wl, wr)):
        # No pilot bandwidth (e.g. too few support points for one): the default window.
        wl = wr = local_window(d)
    K = kernel_fn(kernel)
    best = float("nan")
    for side, ws in ((~d.right, wl), (d.right, wr)):
        u, n, s1, s2 = d.u[side], d.n[side], d.s1[side], d.s2[side]
        if not (np.isfinite(ws) and ws > 0):
            continue
        dist = np.unique(np.abs(u))
        if dist.size >= 4:
            ws = max(ws, (dist[3] + dist[4]) / 2 if dist.size > 4 else dist[3] * 1.5)
        w = K(u / ws)
        m = w > 0
        if m.sum() < 3:
            # Two support values show no curvature: the other side's bound has to serve.
            if both:
                return float("nan")
            continue
        try:
            L, R = coef_weights(u[m], n[m], w[m], 2)
        except np.linalg.LinAlgError:
            if both:
                return float("nan")
            continue
        second = 2.0 * float(L[2] @ s1[m])
        var = float(((2.0 * L[2]) ** 2 * _sig(vce, u[m], n[m], s1[m], s2[m], L, R)).sum())
        best = np.fmax(best, abs(second) + z * np.sqrt(max(var, 0.0)))
    return float(best)


def side_bias_integral(a, w) -> float:
    """``∫₀^∞ |G(t)| dt`` with ``G(t) = Σ_i w_i (a_i − t)₊``, exactly (G is piecewise linear).

    Parameters
    ----------
    a : distances |u| ≥ 0 of one side's support points from the cutoff.
    w : the estimate's total weight on each point (row weight × rows).

    Notes
    -----
    For ``f`` with ``f(0) = f'(0) = 0``, ``f(a) = ∫₀^a (a − t) f''(t) dt``, so ``Σ w_i f(a_i) =
    ∫ G(t) f''(t) dt``: the largest value over ``|f''| ≤ M`` is ``M ∫|G|``, attained by
    ``f'' = M·sign G`` (Armstrong & Kolesár 2018, Econometrica 86(2), worst-case bias of a linear
    estimator over a convex symmetric class; the integral form is our derivation for the class
    of bounded second derivatives).  Between knots G is linear: a segment with end values g₀, g₁
    of one sign contributes ``L(|g₀| + |g₁|)/2``, one that crosses zero ``L(g₀² + g₁²)/(2(|g₀| + |g₁|))``.
    """
    a = np.asarray(a, float)
    w = np.asarray(w, float)
    if a.size == 0:
        return 0.0
    order = np.argsort(a)
    a, w = a[order], w[order]
    knots = np.unique(np.r_[0.0, a])
    # Suffix sums over points beyond each knot: G(t) = Σ_{a_i > t} w_i a_i − t Σ_{a_i > t} w_i.
    sw = np.r_[np.cumsum(w[::-1])[::-1], 0.0]
    swa = np.r_[np.cumsum((w * a)[::-1])[::-1], 0.0]
    first = np.searchsorted(a, knots, side="right")
    g = swa[first] - knots * sw[first]
    g0, g1, L = g[:-1], g[1:], np.diff(knots)
    s0, s1 = np.abs(g0), np.abs(g1)
    same = (g0 * g1) >= 0
    with np.errstate(invalid="ignore", divide="ignore"):
        cross = np.where(s0 + s1 > 0, (g0 * g0 + g1 * g1) / (2 * (s0 + s1)), 0.0)
    return float((L * np.where(same, (s0 + s1) / 2, cross)).sum())


def worst_case_bias(u, w, right, M: float) -> float:
    """Largest |bias| of ``Σ w_b μ(u_b)`` over μ with ``|μ''| ≤ M`` on each side of the cutoff.

    Parameters
    ----------
    u : support points (centred at the cutoff).
    w : the estimate's total weight on each point; on each side the weights must sum to ±1 and
        annihilate slopes (any local polynomial of degree ≥ 1 does).
    right : boolean mask of the right side.
    M : bound on the second derivative.

    Returns
    -------
    ``M (∫|G_left| + ∫|G_right|)`` (:func:`side_bias_integral`); the sides add because μ may bend
    independently on each side.

    Notes
    -----
    Armstrong & Kolesár (2018), Econometrica 86(2), and Kolesár & Rothe (2018), AER 108(8), class
    of bounded second derivatives; checked against a linear-programming maximisation in
    tests/test_honest_bias.py.
    """
    u = np.asarray(u, float)
    w = np.asarray(w, float)
    return float(M) * (side_bias_integral(np.abs(u[~right]), w[~right])
                       + side_bias_integral(np.abs(u[right]), w[right]))


def taylor_bias_bound(u, w, M: float) -> float:
    """``(M/2) Σ |w| u²``: the worst case when only the Taylor remainder at the cutoff is bounded.

    Kept for comparison; it is larger than :func:`worst_case_bias` whenever weights change sign.
    """
    u = np.asarray(u, float)
    return 0.5 * float(M) * float((np.abs(np.asarray(w, float)) * u * u).sum())


@dataclass(frozen=True)
class HonestFit:
    """A bias-aware fixed-length interval around the conventional estimate."""

    ci_low: float
    ci_high: float
    max_bias: float
    cv: float
    bound_M: float
    p_value: float


def honest_interval(d: SideData, h, M: float, kernel: str = "triangular", p: int = 1,
                    alpha: float = 0.05, vce: str = "hc3", bias: str = "exact") -> HonestFit:
    """Bias-aware interval for the local polynomial jump under |μ''| ≤ M on each side.

    Parameters
    ----------
    d : SideData of the column at the cutoff.
    h : bandwidth (number or (left, right)), running-variable units.
    M : bound on the second derivative (outcome units per running-variable unit squared).
    alpha : 1 − coverage.
    vce : variance estimator, as in ``robust.robust_jump``.
    bias : "exact" (default, :func:`worst_case_bias`) or "taylor" (:func:`taylor_bias_bound`,
        kept to measure what the exact bias gains).

    Returns
    -------
    HonestFit: ``τ̂ ± cv(B̄/se)·se`` with ``B̄`` the exact worst-case bias
    (:func:`worst_case_bias`); ``p_value`` is the smallest α whose interval excludes zero.

    Notes
    -----
    Kolesár & Rothe (2018), AER 108(8), bounded-second-derivative class; worst-case bias and
    fixed-length critical values from Armstrong & Kolesár (2018, Econometrica 86(2); 2020).  It
    holds for any degree p ≥ 1 (the weights reproduce lines, so only μ'' matters).
    """
    return _honest_at(_honest_parts(d, h, kernel, p, vce, bias), M, alpha)


def _honest_parts(d: SideData, h, kernel: str, p: int, vce: str, bias: str):
    """What the bias-aware interval needs apart from M: (estimate, se, per-side bias factors,
    bias kind), or None when it cannot be formed.  The worst-case bias is linear in M."""
    if p < 1:
        # Local constant weights do not reproduce slopes, so a bound on μ'' alone does not
        # bound their bias: no bias-aware interval for degree 0.
        return None
    hl, hr = _pair(h)
    conv = se = 0.0
    factors = []
    rows = 0.0
    K = kernel_fn(kernel)
    for sign, side, hs in ((-1.0, ~d.right, hl), (1.0, d.right, hr)):
        u, n, s1, s2 = d.u[side], d.n[side], d.s1[side], d.s2[side]
        w = K(u / hs)
        m = w > 0
        if m.sum() < p + 1:
            return None
        try:
            L, R = coef_weights(u[m], n[m], w[m], p)
        except np.linalg.LinAlgError:
            return None
        conv += sign * (L[0] @ s1[m])
        Lf = np.zeros((p + 1, u.size))
        Lf[:, m] = L
        se += (L[0] ** 2 * _sig(vce, u, n, s1, s2, Lf, powers(u, p))[m]).sum()
        wts = n[m] * L[0]
        if bias == "taylor":
            factors.append(float((np.abs(wts) * u[m] * u[m]).sum()))
        else:
            factors.append(side_bias_integral(np.abs(u[m]), wts))
        rows += n[m].sum()
    se = float(np.sqrt(se * _scale(vce, rows, 2 * (p + 1))))
    return conv, se, factors, bias


def _honest_at(parts, M: float, alpha: float) -> HonestFit:
    """The bias-aware interval at curvature bound ``M`` from :func:`_honest_parts`."""
    nan = float("nan")
    if parts is None or not np.isfinite(M):
        return HonestFit(nan, nan, nan, nan, float(M), nan)
    conv, se, factors, bias = parts
    # M·(left + right), as worst_case_bias forms it (tested against it); half that for Taylor.
    B = float(M) * (factors[0] + factors[1])
    if bias == "taylor":
        B *= 0.5
    if se == 0 and np.isfinite(conv):
        # No noise (e.g. a deterministic uptake rule): only the bias bound is left.
        return HonestFit(float(conv - B), float(conv + B), float(B), float("inf"),
                         float(M), 0.0 if abs(conv) > B else 1.0)
    if not se > 0:
        return HonestFit(nan, nan, nan, nan, float(M), nan)
    t = B / se
    cv = honest_cv(t, alpha)
    z = abs(conv) / se
    pv = float(special.ndtr(t - z) + special.ndtr(-z - t))   # = norm.sf(z − t) + norm.cdf(−z − t)
    return HonestFit(float(conv - cv * se), float(conv + cv * se), float(B), cv, float(M),
                     min(1.0, pv))


def honest_best(d: SideData, M: float, kernel: str = "triangular", p: int = 1,
                alpha: float = 0.05, vce: str = "hc3", max_candidates: int = 40,
                bias: str = "exact"):
    """Bias-aware interval at the bandwidth that makes it shortest; returns (HonestFit, h).

    Candidate bandwidths sit halfway between consecutive distinct distances |x − c| (the
    ``max_candidates`` nearest), so each adds one support point; meant for coarse running
    variables, where the list is short.

    Notes
    -----
    Armstrong & Kolesár (2020) choose the bandwidth that minimises the length of the fixed-length
    interval; Kolesár & Rothe (2018) apply it to discrete running variables.
    """
    dist = np.unique(np.abs(d.u))[: max_candidates + 1]
    cands = (dist[:-1] + dist[1:]) / 2 if dist.size > 1 else dist * 1.5
    best, best_h = None, float("nan")
    for h in np.r_[cands, dist[-1] * 1.5 if dist.size else []]:
        fit = honest_interval(d, float(h), M, kernel, p, alpha, vce, bias)
        if np.isfinite(fit.ci_low) and (best is None or
                                        fit.ci_high - fit.ci_low < best.ci_high - best.ci_low):
            best, best_h = fit, float(h)
    if best is None:
        nan = float("nan")
        best = HonestFit(nan, nan, nan, nan, float(M), nan)
    return best, best_h


def honest_by_M(d: SideData, h, M: float, kernel: str = "triangular", p: int = 1,
                alpha: float = 0.05, vce: str = "hc3", factors=M_FACTORS) -> list[dict]:
    """The bias-aware interval at multiples of the curvature bound (same bandwidth).

    M is an assumption (Armstrong & Kolesár 2020; Kolesár & Rothe 2018), so the reader sees how
    the interval moves with it.  One dict per factor: ``factor``, ``M``, ``ci_low``, ``ci_high``,
    ``max_bias``, ``p_value``.
    """
    out = []
    parts = _honest_parts(d, h, kernel, p, vce, "exact")     # the same at every M
    for f in factors:
        fit = _honest_at(parts, f * M, alpha)
        out.append({"factor": float(f), "M": float(f * M), "ci_low": fit.ci_low,
                    "ci_high": fit.ci_high, "max_bias": fit.max_bias, "p_value": fit.p_value})
    return out
