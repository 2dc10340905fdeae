"""The inference fields of one candidate row: robust, conventional and bias-aware intervals.

Which interval is reported as ``ci_low``/``ci_high`` (field ``interval``):

* ``"robust"`` (default): the robust bias-corrected interval of Calonico, Cattaneo & Titiunik
  (2014), centred on ``jump_bc`` with ``se_robust``; ``p_value`` is the robust one.
* ``"honest"``, when the candidate is coarse (fewer than the scan's minimum of distinct support
  values on a side inside h): the bias-aware fixed-length interval of Kolesár & Rothe (2018) /
  Armstrong & Kolesár (2020) at the bandwidth that makes it shortest, with the local curvature
  bound ``honest_bound_M`` (``honest.curvature_bound``); ``p_value`` is then the honest one.
  Otherwise the honest interval at h is reported beside the robust one.

Why this rule.  The robust interval's bias correction needs a local quadratic on each side with
room to spare, and the bandwidth is widened until each side holds the minimum of distinct values;
a lattice that has them (a half-integer score with ten values per side) is then no different for
the robust interval, which covers close to 0.95 there (benchmarks/coverage_cct.py).  A side with
fewer values leaves a bias that does not shrink as rows are added (Kolesár & Rothe 2018, AER
108(8)), and only an interval that allows for it is valid.  The bias-aware interval is not made
the default elsewhere: its coverage is 0.95 only at the least favourable mean of the class
``|μ''| ≤ M`` and higher for every other, so reporting it wherever the robust interval is valid
would over-cover without need (0.98 on the half-integer lattice even at the true M).

``jump`` stays the conventional estimate; the conventional interval ``jump ± 1.96·se`` (HC1,
as the core's ``se``) is kept as ``ci_low_conventional``/``ci_high_conventional``.  Robust and
honest intervals use HC3 (``robust.py`` says why); ``se_conventional_hc3`` is the HC3 version of
``se``.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..bins import BinnedStats
from .local import SideData, Z95, joint_side_data, se_floor, two_sided_p
from .mse import fuzzy_side_data, pilot_ratio
from .robust import (curvature_bound, honest_best, honest_by_M, honest_interval, robust_fuzzy,
                     robust_jump)
from .select import Selection, select_bandwidth, sensitivity


def inference_fields(d: SideData, sel: Selection, kernel: str, degree: int, coarse: bool,
                     se_conventional: float | None = None, levels=()) -> dict:
    """Robust, conventional and honest interval fields plus the sensitivity runs.

    Parameters
    ----------
    d : SideData of the candidate's column at the cutoff.
    sel : chosen bandwidths (``select.select_bandwidth``).
    coarse : report the bias-aware interval as the main one.
    se_conventional : the row's conventional SE (HC1, ``local.fit_jump``); the conventional
        interval is built from it so ``jump``, ``se`` and that interval agree.  When None, the
        conventional part of the robust fit (HC3) is used.
    levels : the fitted one-sided limits; the robust SE is held above ``local.se_floor`` of
        them (a numerical floor relative to the data's scale).

    Returns
    -------
    dict of results.json fields (see the module docstring and docs/methods.md).
    """
    rob = _floored(robust_jump(d, sel.h, sel.b, kernel, degree), levels)
    M = curvature_bound(d, window=sel.b, kernel=kernel)   # local fits at the bias pilot b
    if coarse:
        hon, h_hon = honest_best(d, M, kernel, degree)
    else:
        hon, h_hon = honest_interval(d, sel.h, M, kernel, degree), sel.h_left
    out = {
        "jump_bc": rob.jump_bc, "se_robust": rob.se_robust,
        "ci_low_robust": rob.ci_low, "ci_high_robust": rob.ci_high,
        "p_value_robust": rob.p_value,
        "ci_low_conventional": rob.ci_low_conventional,
        "ci_high_conventional": rob.ci_high_conventional,
        "se_conventional_hc3": rob.se,
        "ci_low_honest": hon.ci_low, "ci_high_honest": hon.ci_high,
        "p_value_honest": hon.p_value, "honest_bound_M": hon.bound_M,
        "honest_max_bias": hon.max_bias, "honest_bandwidth": h_hon,
        "honest_by_M": honest_by_M(d, h_hon if coarse else sel.h, M, kernel, degree),
        "bandwidth_left": sel.h_left, "bandwidth_right": sel.h_right,
        "bias_bandwidth_left": sel.b_left, "bias_bandwidth_right": sel.b_right,
        "inference_reason": rob.reason,
    }
    if se_conventional is not None and np.isfinite(rob.jump):
        out["ci_low_conventional"] = rob.jump - Z95 * se_conventional
        out["ci_high_conventional"] = rob.jump + Z95 * se_conventional
    use_honest = coarse and np.isfinite(hon.ci_low)
    if use_honest:
        out.update(interval="honest", ci_low=hon.ci_low, ci_high=hon.ci_high, p_value=hon.p_value)
    elif np.isfinite(rob.ci_low):
        out.update(interval="robust", ci_low=rob.ci_low, ci_high=rob.ci_high, p_value=rob.p_value)
    else:
        out.update(interval="conventional")   # keeps the conventional fields already in the row
    out["sensitivity"] = sensitivity(d, sel, kernel, degree, main=rob)
    return out


def _floored(rob, levels):
    """The robust fit with its SE held above the numerical floor of ``local.se_floor``."""
    floor = se_floor(*levels) if levels else 0.0
    if not (np.isfinite(rob.se_robust) and rob.se_robust < floor):
        return rob
    z = rob.jump_bc / floor
    return replace(rob, se_robust=floor, ci_low=rob.jump_bc - Z95 * floor,
                   ci_high=rob.jump_bc + Z95 * floor, z_robust=z, p_value=two_sided_p(z))


def fuzzy_inference(stats: BinnedStats, treatment: str, outcome: str, cutoff: float,
                    bandwidth="mse", kernel: str = "triangular", degree: int = 1,
                    per_side: bool = False, right_closed: bool = True, min_distinct: int = 5):
    """Fuzzy RD effect with a data-driven bandwidth and robust bias-corrected interval.

    Parameters
    ----------
    stats : BinnedStats with joint sums for the (treatment, outcome) pair.
    bandwidth : "mse", "cer", "ik" or a number (running-variable units), as ``search.bandwidth``.

    Returns
    -------
    (RobustFit on the effect scale, Selection).

    Notes
    -----
    The bandwidth is chosen for the linearised ratio Y − τ̃T (τ̃ the local Wald ratio at the
    pilot bandwidth), one bandwidth for numerator and denominator; robust bias correction of
    both jumps after Calonico, Cattaneo & Titiunik (2014).
    """
    dT, dY, sab = joint_side_data(stats, treatment, outcome, cutoff, right_closed)
    tau = pilot_ratio(dT, dY, kernel, degree) if isinstance(bandwidth, str) else 0.0
    target = fuzzy_side_data(dT, dY, sab, tau) if np.isfinite(tau) else dY
    sel = select_bandwidth(target, bandwidth, kernel, degree, per_side, min_distinct)
    return robust_fuzzy(dT, dY, sab, sel.h, sel.b, kernel, degree), sel
