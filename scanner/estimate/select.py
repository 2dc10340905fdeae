"""Bandwidth choice for a candidate and the sensitivity of its estimate, on SideData.

``select_bandwidth`` turns the spec's ``search.bandwidth`` ("mse", "cer", "ik" or a number) and
``search.per_side`` into main and bias-pilot bandwidths.  Data-driven choices are widened so
each side holds ``min_distinct`` support points (the scan's rule; fewer means the candidate is
flagged coarse).  A fixed number gives b = h (ρ = 1: the robust interval is then the local
quadratic fit's, METHODS.md §3 item 6).  IK keeps the bias pilot b of the MSE procedure.

``sensitivity`` refits at 0.5, 0.75, 1, 1.5 and 2 × h (b scaled alike, so ρ stays fixed) and at
donut variants that drop the 1 and 2 support values nearest the cutoff on each side
(Barreca, Lindo & Waddell 2016, Economic Inquiry 54(1), donut RD).
"""
from __future__ import annotations

from dataclasses import dataclass, asdict

import numpy as np

from .bandwidth import ik_bandwidth
from .local import SideData
from .mse import mse_bandwidth, reach
from .robust import robust_jump

METHODS = ("mse", "cer", "ik")
FACTORS = (0.5, 0.75, 1.0, 1.5, 2.0)
DONUTS = (1, 2)


@dataclass(frozen=True)
class Selection:
    """Main bandwidths (left, right), bias-pilot bandwidths, the method used and a note."""

    h_left: float
    h_right: float
    b_left: float
    b_right: float
    method: str
    note: str | None = None

    @property
    def h(self):
        return (self.h_left, self.h_right)

    @property
    def b(self):
        return (self.b_left, self.b_right)

    def to_dict(self) -> dict:
        return asdict(self)


def _side_only(d: SideData, right: bool) -> SideData:
    m = d.right if right else ~d.right
    # Mirror the side so reach() sees it on both "sides": only its own distances matter.
    return SideData(d.u[m], d.n[m], d.s1[m], d.s2[m], np.ones(m.sum(), bool))


def select_bandwidth(d: SideData, method, kernel: str = "triangular", degree: int = 1,
                     per_side: bool = False, min_distinct: int = 5) -> Selection:
    """Bandwidths for one candidate.

    Parameters
    ----------
    d : SideData of the column whose jump is estimated.
    method : "mse" (CCT 2014), "cer" (h_MSE·N^(-1/20), Calonico, Cattaneo & Farrell 2020),
        "ik" (Imbens & Kalyanaraman 2012) or a positive number (running-variable units).
    per_side : separate left and right bandwidths (mse and cer only).
    min_distinct : data-driven bandwidths are widened to hold this many support points per side.

    Returns
    -------
    Selection; when the data-driven step fails the bandwidth is the narrowest window holding
    ``min_distinct`` support points per side (method "nearest") and ``note`` says why.
    """
    if not isinstance(method, str):
        h = float(method)
        return Selection(h, h, h, h, "fixed")
    if d.u.size == 0:
        nan = float("nan")
        return Selection(nan, nan, nan, nan, method, "no data")
    ch = mse_bandwidth(d, kernel, degree, per_side=per_side and method != "ik",
                       cer=method == "cer")
    note = ch.note
    hl, hr, bl, br = ch.h_left, ch.h_right, ch.b_left, ch.b_right
    label = ch.method if method != "ik" else "ik"
    if method == "ik":
        ik = ik_bandwidth(None, None, 0.0, kernel, data=d)
        hl = hr = ik.h
        note = ik.note
    need_l = reach(_side_only(d, False), min_distinct)
    need_r = reach(_side_only(d, True), min_distinct)
    if not (np.isfinite(hl) and np.isfinite(hr)):
        # No data-driven choice: the narrowest window holding min_distinct support points per
        # side (a side with fewer contributes all of its points).  It stays next to the cutoff
        # whatever the range or skew of the running variable; a fraction of the range did not
        # (a quarter of a lognormal's range was 1,343 units for a cutoff at 0.1).
        hl = hr = max(need_l, need_r)
        note = ((note or "bandwidth not computable")
                + f"; using the narrowest window with {min_distinct} distinct values per side")
        label = "nearest"
    if not (np.isfinite(bl) and np.isfinite(br)):
        bl, br = hl, hr
    if per_side and method != "ik":
        wl, wr = max(hl, need_l), max(hr, need_r)
    else:
        wl = wr = max(hl, need_l, need_r)
    if (wl, wr) != (hl, hr):
        note = f"bandwidth widened to reach {min_distinct} distinct values per side"
    return Selection(float(wl), float(wr), float(max(bl, wl)), float(max(br, wr)), label, note)


def donut(d: SideData, k: int) -> SideData:
    """SideData without the ``k`` support values nearest the cutoff on each side."""
    keep = np.ones(d.u.size, bool)
    for side in (d.right, ~d.right):
        near = np.unique(np.abs(d.u[side]))[:k]
        keep &= ~(side & np.isin(np.abs(d.u), near))
    return SideData(d.u[keep], d.n[keep], d.s1[keep], d.s2[keep], d.right[keep])


def sensitivity(d: SideData, sel: Selection, kernel: str = "triangular", degree: int = 1,
                factors=FACTORS, donuts=DONUTS, main=None) -> list[dict]:
    """Estimates at multiples of the chosen bandwidth and with donut holes, one dict each.

    ``main`` (optional) is the candidate's own ``robust_jump`` at (h, b): the ×1 run is that
    same fit, so it is reused rather than recomputed.

    Each dict: ``variant`` ("h×0.5", …, "donut 1", …), ``bandwidth`` (left), ``jump``, ``se``
    (conventional), ``jump_bc``, ``ci_low``, ``ci_high`` (robust), ``reason``.

    Notes
    -----
    Bandwidth sensitivity is common practice in RD reporting (e.g. Imbens & Lemieux 2008, J.
    Econometrics 142(2)); donut variants after Barreca, Lindo & Waddell (2016).
    """
    out = []
    runs = [(f"h×{f:g}", f, d) for f in factors] + [(f"donut {k}", 1.0, donut(d, k)) for k in donuts]
    for name, f, data in runs:
        if f == 1.0 and data is d and main is not None:
            fit = main
        else:
            fit = robust_jump(data, (sel.h_left * f, sel.h_right * f),
                              (sel.b_left * f, sel.b_right * f), kernel, degree)
        out.append({"variant": name, "bandwidth": sel.h_left * f, "jump": fit.jump, "se": fit.se,
                    "jump_bc": fit.jump_bc, "ci_low": fit.ci_low, "ci_high": fit.ci_high,
                    "reason": fit.reason})
    return out
