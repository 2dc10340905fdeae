"""Compliance profile at the cutoff from the two one-sided limits of uptake.

With a binary treatment, monotonicity (no one is put off treatment by becoming eligible) and the
usual RD continuity, the limits of uptake just inside and just outside the eligible side identify
the shares of always-takers, never-takers and compliers at the cutoff (Imbens & Angrist 1994,
Econometrica 62(2), applied at the cutoff as in Hahn, Todd & van der Klaauw 2001): with p_in the
uptake limit on the eligible side and p_out on the other,

    always-takers = p_out,   never-takers = 1 − p_in,   compliers = p_in − p_out,

which sum to one by construction.  The limits of a 0/1 uptake are shares, so the shares are
computed from the limits clipped to [0, 1] (a local linear fit can overshoot near 0 or 1: a
fitted −0.04 is a share of 0 with some noise).  A limit outside [0, 1] by more than 1.96 of its
standard errors, or a complier share below 0 by as much, is not noise: the shares are then not
reported (NaN) and ``impossible`` says why (the scan flags it "impossible").  "The threshold binds for X%" is the complier share.  The
eligible side is the rule's, or — without a rule — the side where uptake is higher.  Standard
errors: the complier share's is the jump's; the other two are the one-sided limits' HC1 SEs.
"""
from __future__ import annotations

from dataclasses import dataclass, asdict

import numpy as np

from ..estimate.local import Z95, SideData, fit_jump, is_binary


@dataclass(frozen=True)
class Compliance:
    share_always: float
    share_never: float
    share_compliers: float
    se_always: float
    se_never: float
    se_compliers: float
    eligible: str            # "right" or "left"
    reason: str | None = None
    impossible: str | None = None

    def to_dict(self) -> dict:
        return asdict(self)


def _one_sided_se(stats, data: SideData, fit, right: bool, kernel, degree, right_closed):
    """HC1 SE of one side's limit: refit with the other side's outcome made constant (zero RSS)."""
    other = ~data.right if right else data.right
    s1 = np.where(other, data.n * 0.5, data.s1)
    s2 = np.where(other, data.n * 0.25, data.s2)
    d = SideData(data.u, data.n, s1, s2, data.right)
    return fit_jump(stats, "", fit.cutoff, fit.bandwidth, kernel, degree, right_closed, data=d).se


def compliance_profile(stats, data: SideData, fit, eligible_side: str | None = None,
                       kernel: str = "triangular", degree: int = 1,
                       right_closed: bool = True, binary: bool | None = None) -> Compliance:
    """Always-taker, never-taker and complier shares at the cutoff from a first-stage fit.

    Parameters
    ----------
    data : the treatment's SideData at the cutoff; ``fit`` : its JumpFit.
    eligible_side : the rule's eligible side ("below", "at_or_above", ...) or None.
    binary : whether the treatment is 0/1, decided on the raw data (``Variation.binary``).
        Needed when ``data`` went through ``floor_variance``: the floor raises Σy² on a
        constant side, so a 0/1 column would no longer look binary and the impossibility check
        and clipping would be skipped exactly when one side has no variation.  None: decide
        from ``data`` (correct only for unfloored data).

    Returns
    -------
    Compliance shares (in [0, 1] when the limits are) with standard errors.
    """
    nan = float("nan")
    if not np.isfinite(fit.jump):
        return Compliance(nan, nan, nan, nan, nan, nan, "", fit.reason)
    if eligible_side:
        right = "above" in eligible_side
    else:
        right = fit.right >= fit.left
    p_in, p_out = (fit.right, fit.left) if right else (fit.left, fit.right)
    se_r = _one_sided_se(stats, data, fit, True, kernel, degree, right_closed)
    se_l = _one_sided_se(stats, data, fit, False, kernel, degree, right_closed)
    se_in, se_out = (se_r, se_l) if right else (se_l, se_r)
    reason = None
    if p_in < p_out:
        reason = "uptake is lower on the eligible side: the shares assume monotonicity"
    side = "right" if right else "left"
    if binary is None:
        binary = is_binary(data)
    bad = _impossible(p_in, se_in, p_out, se_out, fit.se, side) if binary else None
    if bad:
        return Compliance(nan, nan, nan, float(se_out), float(se_in), float(fit.se), side,
                          bad, bad)
    if binary:
        p_in, p_out = (min(max(v, 0.0), 1.0) for v in (p_in, p_out))
    return Compliance(float(p_out), float(1 - p_in), float(p_in - p_out), float(se_out),
                      float(se_in), float(fit.se), side, reason)


def _impossible(p_in, se_in, p_out, se_out, se_jump, eligible) -> str | None:
    """Why the shares are impossible beyond noise (None when they are possible)."""
    other = "left" if eligible == "right" else "right"
    for name, v, se, where in (("uptake", p_in, se_in, eligible), ("uptake", p_out, se_out, other)):
        if np.isfinite(v) and np.isfinite(se) and (v < -Z95 * se or v > 1 + Z95 * se):
            return (f"the fitted {name} just {where} of the cutoff is {v:.3f}, outside [0, 1] by "
                    f"more than 1.96 SE: the local fit overshoots, so no shares are reported")
    if np.isfinite(se_jump) and p_in - p_out < -Z95 * se_jump:
        return ("uptake is clearly lower on the eligible side: a negative complier share is "
                "impossible under monotonicity, so no shares are reported")
    return None
