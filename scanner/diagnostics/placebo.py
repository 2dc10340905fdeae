"""Placebo cutoffs on one side of the real cutoff, and the empirical p-value of the real jump.

Placebo cutoffs (a check recommended by Imbens & Lemieux 2008, J. Econometrics 142(2), from
memory) are points where no rule applies, so their jumps show how large "jumps" the smooth uptake
curve produces by chance and by curvature.  Each placebo uses only data strictly on one side of
the real cutoff — its whole window [p − h, p + h] lies on that side — so the real jump cannot leak
in.  Placebos sit every h (windows overlap by half) and use the candidate's bandwidth, kernel
and degree.  The empirical p-value of the real jump is (1 + #{|t_placebo| ≥ |t_real|}) / (1 + P)
with t the jump over its standard error, so it is never below 1/(P + 1).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..estimate.batch import jumps_at
from ..estimate.local import SideData

MAX_PER_SIDE = 15


@dataclass(frozen=True)
class PlaceboResult:
    p_value: float
    n_placebos: int
    cutoffs: list = field(default_factory=list)
    z: list = field(default_factory=list)
    reason: str | None = None
    exceed: int = 0


def placebo_test(stats, data: SideData, cutoff: float, bandwidth: float, z_real: float,
                 kernel: str = "triangular", degree: int = 1,
                 max_per_side: int = MAX_PER_SIDE) -> PlaceboResult:
    """Jumps at placebo cutoffs on each side of ``cutoff`` and the empirical p-value of ``z_real``.

    Parameters
    ----------
    data : the candidate's SideData (u = x − cutoff) for the column whose jump is tested.
    bandwidth : the candidate's bandwidth h (running-variable units).
    z_real : the real jump's t-statistic.

    Returns
    -------
    PlaceboResult; NaN p-value with a reason when no placebo fits on either side.
    """
    h = float(bandwidth)
    nan = float("nan")
    if not (np.isfinite(h) and h > 0 and np.isfinite(z_real)):
        return PlaceboResult(nan, 0, reason="no real jump to compare")
    cuts, zs = [], []
    for is_right, side in ((False, ~data.right), (True, data.right)):
        u, n, s1, s2 = data.u[side], data.n[side], data.s1[side], data.s2[side]
        if u.size == 0:
            continue
        # Placebo p needs its window inside one side: h ≤ p ≤ max − h (right), mirrored on the left.
        # Only the first max_per_side steps are formed (a range of 1e300 with a small h would
        # not fit in memory); h + i·h as np.arange computes its values.
        reach = (u.max() if is_right else -u.min()) - h + 1e-12
        steps = h + np.arange(max_per_side) * h
        points = steps[steps < reach] * (1.0 if is_right else -1.0)
        # All placebo fits of a side at once: the windows, weights and solves as arrays
        # (scanner.estimate.batch; the numbers of one fit_jump per placebo).
        _, _, z = jumps_at(u, n, s1, s2, points, h, kernel, degree)
        for p, zp in zip(points, z):
            if np.isfinite(zp):
                cuts.append(float(np.round(cutoff + p, 12)))
                zs.append(float(zp))
    if not zs:
        return PlaceboResult(nan, 0, reason="no room for a placebo cutoff on either side")
    exceed = int((np.abs(zs) >= abs(z_real)).sum())
    return PlaceboResult(float((1 + exceed) / (1 + len(zs))), len(zs), cuts, zs, None, exceed)
