"""MSE-optimal bandwidths with an estimated bias (after Calonico, Cattaneo & Titiunik 2014).

Steps (p = 1 main fit, q = p + 1 bias fit), all on bin sums:

0. Pilot ``c = 1.84·s·N^(-1/5)`` (normal reference, METHODS.md §2), widened to hold ``q + 2``
   distinct values per side.
0'. Both the pilot and step 1 use the skew-resistant scale ``s = min(S_X, IQR/1.349)``
   (:func:`spread`): with S_X, a lognormal score put the pilot and the global fit among far-away
   tail values, h came out 20 times the width of the curvature at the cutoff and robust coverage
   was 0.70.
1. ``μ^{(q+1)}`` per side from a global quintic on that side's rows within ``3·s`` of the cutoff
   (the pilot for the pilot; our choice, in the spirit of Imbens & Kalyanaraman's global cubic,
   which they fit between the side medians).  A quartic underestimated the
   third derivative of CCT Model 1 (median 32 vs the true 121 on the left), which made b and h
   too large and robust coverage 0.926 instead of 0.944 (1,000 replications).
2. Pilot ``b``: MSE-optimal for estimating the bias term ``Σ_s ±κ_s β_{q,s}``.  At bandwidth c the
   sample operators give its variance ``V_b(c)`` (scaling ``(c/b)^{2q+1}``) and its leading bias
   ``B_b(c)`` (the ``u^{q+1}`` shift of the order-q fit, scaling ``b/c``), so
   ``b^{2q+3} = (2q+1)·V_b(c)·c^{2q+1} / (2·(B_b(c)/c)²)``, widened to hold q + 2 support
   values per side.
3. ``h``: ``MSE(h) = h^{2(p+1)}·(B² + R) + V(c)·c/h`` with the bias constant ``B = Σ_s ±κ_s(c)
   β̂_{q,s}(b) / c^{p+1}``, the conventional variance ``V(c)`` at the pilot and the regulariser
   ``R = 3·Var(B̂)`` (IK's factor 3, which keeps h finite when the curvature is the same on both
   sides), so ``h^{2p+3} = V(c)·c / (2(p+1)·(B² + R))``.
Per side (``per_side=True``) the same balance is solved separately on each side.
Fuzzy: the steps run on ``Y − τ̃T`` with τ̃ the conventional ratio at the pilot, the linearisation
of the ratio (METHODS.md §1).  The coverage-error-optimal variant multiplies h by
``N^{-p/((2p+3)(p+3))}`` (``N^{-1/20}`` for p = 1; Calonico, Cattaneo & Farrell 2020,
Econometrics Journal 23(2)).

Variances are HC0-type residual sums of the fit at the pilot; constants come from the data's
own operators, not from kernel tables, so any kernel in ``kernels.KERNELS`` works.
"""
from __future__ import annotations

from dataclasses import dataclass, asdict

import numpy as np

from ..engines.plan import weighted_quantile
from .local import SideData, _rss
from .robust import coef_weights, side_operator
from .kernels import kernel as kernel_fn

PILOT_C = 1.84     # METHODS.md §2: normal-reference constant of the IK density pilot
REG_FACTOR = 3.0   # Imbens & Kalyanaraman (2012): regulariser = 3 × variance of the bias estimate
GLOBAL_ORDER = 5   # per-side global polynomial giving μ^(q+1) (step 1; = q + 3 for p = 1)
GLOBAL_REACH = 3.0  # step 1 uses rows within GLOBAL_REACH × spread(d) of the cutoff


@dataclass(frozen=True)
class MseChoice:
    """Bandwidths (left, right) of the main fit and of the bias fit, with their pieces."""

    h_left: float
    h_right: float
    b_left: float
    b_right: float
    method: str
    pilot: float = float("nan")
    deriv3_left: float = float("nan")
    deriv3_right: float = float("nan")
    bias_const: float = float("nan")
    regul: float = float("nan")
    var_const: float = float("nan")
    note: str | None = None

    @property
    def h(self) -> float:
        return self.h_left if self.h_left == self.h_right else float("nan")

    def to_dict(self) -> dict:
        return asdict(self)


def _nan(method, note, pilot=float("nan")) -> MseChoice:
    nan = float("nan")
    return MseChoice(nan, nan, nan, nan, method, pilot, note=note)


def spread(d: SideData) -> float:
    """Skew-resistant scale of the running variable: ``min(S_X, IQR/1.349)``.

    Silverman's rule-of-thumb scale (common practice in kernel smoothing).  For roughly normal
    or bounded designs it equals S_X (CCT Model 1's 2·Beta(2, 4) − 1: IQR/1.349 = 0.39 > S_X =
    0.36); for a lognormal(0, 2) score S_X is hundreds of units and IQR/1.349 about 2.7.
    """
    return robust_scale(d.u, d.n)


def robust_scale(u: np.ndarray, n: np.ndarray) -> float:
    """``min(S_X, IQR/1.349)`` of values ``u`` with counts ``n`` (Silverman 1986, eq. 3.30).

    The scale behind :func:`spread`; also used to cap the density test's bandwidth.
    """
    N = n.sum()
    mean = (n * u).sum() / N
    sx = float(np.sqrt((n * (u - mean) ** 2).sum() / max(N - 1, 1)))
    q1, q3 = weighted_quantile(u, n, np.array([0.25, 0.75]))
    return min(sx, float(q3 - q1) / 1.349) if q3 > q1 else sx


def pilot_bandwidth(d: SideData, need: int) -> float:
    """``1.84·s·N^(-1/5)`` (s = :func:`spread`) widened so each side holds ``need`` distinct values."""
    c = PILOT_C * spread(d) * d.n.sum() ** -0.2
    return float(max(c, reach(d, need)))


def reach(d: SideData, k: int) -> float:
    """Smallest bandwidth giving each side ``k`` support points with clearly positive weight.

    Halfway between the k-th and (k+1)-th nearest distinct distance (1.5 × the k-th when it is
    the last), so the k-th point does not enter with a vanishing kernel weight.
    """
    out = 0.0
    for side in (d.right, ~d.right):
        dist = np.abs(d.u[side])
        if dist.size == 0:
            continue
        if dist.size > k + 1:
            # Bins hold one key each, so the k + 1 smallest distances are distinct: no full sort.
            dist = np.partition(dist, k)[: k + 1]
        dist = np.unique(dist)
        j = min(k, dist.size) - 1
        out = max(out, (dist[j] + dist[j + 1]) / 2 if j + 1 < dist.size else dist[j] * 1.5)
    return float(out)


def global_derivative(u, n, s1, order: int, deriv: int) -> float:
    """``deriv``-th derivative at 0 of a least-squares polynomial of ``order`` on one side."""
    k = min(order, u.size - 1)
    if k < deriv:
        return float("nan")
    R = np.vander(u, k + 1, increasing=True)
    beta = np.linalg.lstsq((R * n[:, None]).T @ R, R.T @ s1, rcond=None)[0]
    return float(np.prod(np.arange(1, deriv + 1)) * beta[deriv])


def _pilot_pieces(u, n, s1, s2, c, kern, p):
    """At pilot c on one side: conventional variance, κ, x^q coefficient, its variance, its u^{q+1} shift."""
    q = p + 1
    m = np.abs(u) < c          # only bins inside the pilot window carry weight
    u, n, s1, s2 = u[m], n[m], s1[m], s2[m]
    op = side_operator(u, n, c, c, kern, p)
    fit_p = op.Rp @ (op.Lp @ s1)
    fit_q = op.Rq @ (op.Lq @ s1)
    var_p = (op.lp ** 2 * _rss(n, s1, s2, fit_p))[op.in_p].sum()
    var_m = (op.mq ** 2 * _rss(n, s1, s2, fit_q))[op.in_rob].sum()
    shift = (op.mq * n * u ** (q + 1)).sum()
    return var_p, float(op.kappa), var_m, shift


def mse_bandwidth(d: SideData, kernel: str = "triangular", p: int = 1, per_side: bool = False,
                  cer: bool = False) -> MseChoice:
    """MSE-optimal (or coverage-error-optimal) bandwidth h and bias pilot b for a jump.

    Parameters
    ----------
    d : SideData of the column (for a fuzzy design, of ``Y − τ̃T``: see :func:`fuzzy_side_data`).
    kernel : kernel name.
    p : order of the main fit.
    per_side : one bandwidth per side instead of a common one.
    cer : multiply h by ``N^{-p/((2p+3)(p+3))}`` (coverage-error-optimal rule of thumb).

    Returns
    -------
    MseChoice in running-variable units; NaN with a ``note`` when a step cannot be computed.

    Notes
    -----
    Calonico, Cattaneo & Titiunik (2014), Econometrica 82(6), bandwidth with estimated bias and a
    pilot b for the order p + 1 fit; Calonico, Cattaneo & Farrell (2020) for ``cer``.  Steps and
    the choices made where the paper leaves room are in this module's docstring.
    """
    method = ("cer" if cer else "mse") + ("-sides" if per_side else "")
    q = p + 1
    if d.u.size == 0 or d.right.sum() < q + 2 or (~d.right).sum() < q + 2:
        return _nan(method, f"fewer than {q + 2} distinct values on a side")
    N = float(d.n.sum())
    c = pilot_bandwidth(d, q + 2)
    far = max(GLOBAL_REACH * spread(d), reach(d, GLOBAL_ORDER + 2))
    sides = []
    try:
        for sign, side in ((-1.0, ~d.right), (1.0, d.right)):
            u, n, s1, s2 = d.u[side], d.n[side], d.s1[side], d.s2[side]
            near = np.abs(u) <= far
            d3 = global_derivative(u[near], n[near], s1[near], GLOBAL_ORDER, q + 1)
            var_p, kappa, var_m, shift = _pilot_pieces(u, n, s1, s2, c, kernel, p)
            beta_q3 = d3 / np.prod(np.arange(1, q + 2))   # u^{q+1} coefficient of the side's curve
            sides.append(dict(sign=sign, u=u, n=n, s1=s1, s2=s2, d3=d3, var_p=var_p, kappa=kappa,
                              var_m=var_m, bias_m=shift * beta_q3, span=float(np.abs(u).max())))
    except np.linalg.LinAlgError:
        return _nan(method, "singular pilot fit", c)
    # Step 2: pilot b for the bias term Σ ±κ β_q.
    if per_side:
        bs = [_b_rule(s["kappa"] ** 2 * s["var_m"], s["kappa"] * s["bias_m"], c, q, s["span"])
              for s in sides]
    else:
        vb = sum(s["kappa"] ** 2 * s["var_m"] for s in sides)
        bb = sum(s["sign"] * s["kappa"] * s["bias_m"] for s in sides)
        bs = [_b_rule(vb, bb, c, q, max(s["span"] for s in sides))] * 2
    floor_b = reach(d, q + 2)
    bs = [max(b, floor_b) for b in bs]
    # Step 3: β_q at b on each side, then h.
    K = kernel_fn(kernel)
    pieces = []
    for s, b in zip(sides, bs):
        w = K(s["u"] / b)     # zero outside the window, so the masked arrays below are small
        m = w > 0
        if m.sum() < q + 1:
            return _nan(method, "too few values inside the bias pilot", c)
        L, R = coef_weights(s["u"][m], s["n"][m], w[m], q)
        beta = L[q] @ s["s1"][m]
        resid = _rss(s["n"][m], s["s1"][m], s["s2"][m], R @ (L @ s["s1"][m]))
        var_beta = (L[q] ** 2 * resid).sum()
        pieces.append((s["sign"] * s["kappa"] * beta / c ** (p + 1),
                       s["kappa"] ** 2 * var_beta / c ** (2 * p + 2), s["var_p"] * c))
    expo = 1.0 / (2 * p + 3)
    if per_side:
        hs = [_h_rule(B * B, REG_FACTOR * vB, V, p, expo) for B, vB, V in pieces]
        B_all = float("nan")
        reg = float("nan")
        V_all = float("nan")
    else:
        B_all = sum(x[0] for x in pieces)
        reg = REG_FACTOR * sum(x[1] for x in pieces)
        V_all = sum(x[2] for x in pieces)
        hs = [_h_rule(B_all ** 2, reg, V_all, p, expo)] * 2
    if cer:
        hs = [h * N ** (-p / ((2 * p + 3) * (p + 3))) for h in hs]
    note = None
    if not all(np.isfinite(h) and h > 0 for h in hs):
        return _nan(method, "the bias and its variance are both zero near the cutoff", c)
    return MseChoice(float(hs[0]), float(hs[1]), float(bs[0]), float(bs[1]), method, c,
                     sides[0]["d3"], sides[1]["d3"], float(B_all), float(reg), float(V_all), note)


def _b_rule(var_c, bias_c, c, q, span):
    """``b^{2q+3} = (2q+1)·V(c)·c^{2q+1} / (2·(B(c)/c)²)``, capped at the side's span."""
    if not bias_c or not np.isfinite(bias_c):
        return float(span)
    b = ((2 * q + 1) * var_c * c ** (2 * q + 1) / (2 * (bias_c / c) ** 2)) ** (1 / (2 * q + 3))
    return float(min(b, span)) if np.isfinite(b) and b > 0 else float(span)


def _h_rule(B2, reg, V, p, expo):
    denom = 2 * (p + 1) * (B2 + reg)
    return (V / denom) ** expo if denom > 0 else float("nan")


def fuzzy_side_data(dT: SideData, dY: SideData, sab: np.ndarray, tau: float) -> SideData:
    """SideData of ``Y − τT`` (the linearised fuzzy ratio) from the joint sums."""
    s1 = dY.s1 - tau * dT.s1
    s2 = dY.s2 - 2 * tau * sab + tau * tau * dT.s2
    return SideData(dT.u, dT.n, s1, s2, dT.right)


def pilot_ratio(dT: SideData, dY: SideData, kernel: str = "triangular", p: int = 1) -> float:
    """Conventional fuzzy ratio at the pilot bandwidth (for the fuzzy bandwidth's linearisation)."""
    c = pilot_bandwidth(dT, p + 3)
    K = kernel_fn(kernel)
    jumps = []
    for d in (dT, dY):
        j = 0.0
        for sign, side in ((-1.0, ~d.right), (1.0, d.right)):
            w = K(d.u[side] / c)
            m = w > 0
            L, _ = coef_weights(d.u[side][m], d.n[side][m], w[m], p)
            j += sign * (L[0] @ d.s1[side][m])
        jumps.append(j)
    return jumps[1] / jumps[0] if jumps[0] != 0 else float("nan")
