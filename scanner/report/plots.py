"""Display data for figures, computed from BinnedStats and disclosure-controlled.

Binned means are evenly spaced on each side of the cutoff over c ± 2h (clipped to the data);
display bins holding fewer than ``min_cell`` rows are dropped and counted.
"""
from __future__ import annotations

import numpy as np

from ..estimate.local import side_data

BINS_PER_SIDE = 15


def uptake_bins(stats, row: dict, min_cell: int, per_side: int = BINS_PER_SIDE) -> dict:
    """Binned means of the treatment on each side, plus the local fit lines (suppressed bins dropped)."""
    c, h = row["cutoff"], row["bandwidth"]
    d = side_data(stats, row["treatment"], c, row.get("right_closed", True))
    if not d.u.size or not np.isfinite(h):
        return {}
    reach_l = min(2 * h, -d.u[~d.right].min()) if (~d.right).any() else 0
    reach_r = min(2 * h, d.u[d.right].max()) if d.right.any() else 0
    out = {"x": [], "mean": [], "n": [], "side": [], "suppressed_bins": 0}
    for side, reach, sign in ((~d.right, reach_l, -1), (d.right, reach_r, 1)):
        if reach <= 0:
            continue
        edges = np.linspace(0, reach, per_side + 1)
        a = np.abs(d.u[side])
        j = np.clip(np.searchsorted(edges, a, side="right") - 1, 0, per_side - 1)
        inside = a <= reach
        n = np.bincount(j[inside], weights=d.n[side][inside], minlength=per_side)
        s = np.bincount(j[inside], weights=d.s1[side][inside], minlength=per_side)
        sx = np.bincount(j[inside], weights=(d.u[side] * d.n[side])[inside], minlength=per_side)
        for k in range(per_side):
            if n[k] == 0:
                continue
            if n[k] < min_cell:
                out["suppressed_bins"] += 1
                continue
            out["x"].append(float(c + sx[k] / n[k]))
            out["mean"].append(float(s[k] / n[k]))
            out["n"].append(int(n[k]))
            out["side"].append("right" if sign > 0 else "left")
    if np.isfinite(row.get("jump", np.nan)):
        out["fit_left"] = [[c - h, row["left"] - row["slope_left"] * h], [c, row["left"]]]
        out["fit_right"] = [[c, row["right"]], [c + h, row["right"] + row["slope_right"] * h]]
    return out
