"""Power for planned outcomes: minimum detectable intent-to-treat and complier effects.

The jump estimator is linear in the outcome, τ̂ = Σ ℓ_i Y_i, with weights ℓ fixed by the running
variable, kernel, degree and bandwidth of the candidate's first stage.  With σ²₋ and σ²₊ the
outcome's variances near the cutoff on each side (computed about each side's mean inside the
window — never from the outcome's jump, which is not estimated here), the estimator's standard
error is s = √(Σ_left ℓ_i² σ²₋ + Σ_right ℓ_i² σ²₊), and the normal-approximation power function
gives

    MDE_ITT = (z_{1−α/2} + z_{power}) · s            (2.80 · s for α = 0.05, 80% power),
    MDE_complier = MDE_ITT / |first-stage jump|

(docs/methods.md, "Power for planned outcomes").

The design effect is s² over the variance of a difference in means on the same rows,
σ²₊/n₊ + σ²₋/n₋ — the RD-versus-randomised sample inflation of Schochet (2009), J. Educ. Behav.
Stat. 34(2), whose benchmarks are about 2.75–4 with the cutoff at the centre of the score.
Within-side variances include the outcome's slope, so s is slightly conservative.
"""
from __future__ import annotations

import numpy as np
from scipy import stats as sps

from ..estimate.kernels import kernel as kernel_fn
from ..estimate.local import SideData

POWER = 0.8


def _weights(u, n, w, degree):
    """Per-row intercept weights of a weighted polynomial fit on one side."""
    R = np.vander(u, degree + 1, increasing=True)
    A = (R * (w * n)[:, None]).T @ R
    return (R @ np.linalg.inv(A)[:, 0]) * w


def outcome_power(data: SideData, bandwidth: float, first_stage: float, alpha: float,
                  kernel: str = "triangular", degree: int = 1, power: float = POWER,
                  name: str = "") -> dict:
    """Minimum detectable effects for one outcome at one candidate.

    Parameters
    ----------
    data : the outcome's SideData at the cutoff (counts, Σy, Σy² per bin).
    bandwidth : the candidate's bandwidth (running-variable units).
    first_stage : the candidate's uptake jump (for the complier MDE).
    alpha : two-sided level of the planned test.

    Returns
    -------
    dict with ``outcome``, ``mde_itt``, ``mde_complier``, ``se``, ``sd_left``, ``sd_right``,
    ``design_effect``, ``n_window`` and ``reason`` (None when computed).

    Notes
    -----
    Normal-approximation power function (docs/methods.md, "Power for planned outcomes");
    design effect after Schochet (2009).
    """
    nan = float("nan")
    out = {"outcome": name, "mde_itt": nan, "mde_complier": nan, "se": nan, "sd_left": nan,
           "sd_right": nan, "design_effect": nan, "n_window": 0, "power": power, "alpha": alpha,
           "reason": None}
    h = float(bandwidth)
    if not (np.isfinite(h) and h > 0):
        out["reason"] = "no bandwidth"
        return out
    w = kernel_fn(kernel)(data.u / h)
    var, dm = 0.0, 0.0
    sds = []
    for side in (~data.right, data.right):
        m = side & (w > 0)
        nn = data.n[m].sum()
        if m.sum() < degree + 1 or nn < 3:
            out["reason"] = "too few rows on a side within the bandwidth"
            return out
        mean = data.s1[m].sum() / nn
        s2 = max((data.s2[m].sum() - nn * mean ** 2) / (nn - 1), 0.0)
        try:
            ell = _weights(data.u[m], data.n[m], w[m], degree)
        except np.linalg.LinAlgError:
            out["reason"] = "singular local fit"
            return out
        var += s2 * float((data.n[m] * ell ** 2).sum())
        dm += s2 / nn
        sds.append(float(np.sqrt(s2)))
        out["n_window"] += int(nn)
    se = float(np.sqrt(var))
    mult = float(sps.norm.ppf(1 - alpha / 2) + sps.norm.ppf(power))
    out.update(se=se, sd_left=sds[0], sd_right=sds[1], mde_itt=mult * se,
               design_effect=float(var / dm) if dm > 0 else nan)
    if np.isfinite(first_stage) and first_stage != 0:
        out["mde_complier"] = mult * se / abs(first_stage)
    return out
