"""Candidate cutoffs: declared (rule catalogues) and round numbers.

Round numbers follow a 1-2-5 series at the running variable's own scale: the step is the largest
1, 2 or 5 × 10^k not above 1/8 of the central 90% range, and candidates are the multiples of that
step (and of any coarser 5 × 10^k step) inside the 5th–95th percentile range, kept only where at
least ``min_rows`` rows lie within one step on each side.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .bins import BinnedStats
from .engines.plan import nice_width, weighted_quantile
from .rules import Rule
from .units import UnitError, convert, same_unit


@dataclass(frozen=True)
class Candidate:
    """One (running variable, treatment, cutoff) to evaluate."""

    running: str
    treatment: str
    cutoff: float
    origin: str                       # "declared" | "round" | "discovered"
    rule: Rule | None = None
    right_closed: bool = True

    @property
    def rule_id(self):
        return self.rule.id if self.rule else None

    @property
    def eligible_side(self):
        return self.rule.eligible if self.rule else None


def declared(running, treatments, rules: list[Rule]) -> tuple[list[Candidate], list[str]]:
    """Rules whose quantity matches the running variable (and whose treatments, if listed, match).

    A rule stated in another unit than the column is converted onto the column's scale
    (:func:`scanner.units.convert`) and a note records the conversion; a unit that cannot be
    converted raises :class:`scanner.units.UnitError` naming both units.

    Returns the candidates and notes (conversions made).
    """
    out, notes = [], []
    if not running.quantity:
        return out, notes
    for rule in rules:
        if rule.quantity != running.quantity:
            continue
        cutoff = rule_cutoff(rule, running)
        if cutoff != rule.cutoff:
            notes.append(f"rule '{rule.id}': {rule.cutoff:g} {rule.unit} is {cutoff:.6g} "
                         f"{running.unit} on '{running.column}'.")
        for t in treatments:
            if rule.treatments and t not in rule.treatments:
                continue
            out.append(Candidate(running.column, t, cutoff, "declared", rule, rule.right_closed))
    return out, notes


def rule_cutoff(rule: Rule, running) -> float:
    """The rule's cutoff on the running variable's scale (converted when the units differ)."""
    if not (rule.unit and running.unit) or same_unit(rule.unit, running.unit):
        return rule.cutoff
    try:
        return convert(rule.cutoff, rule.unit, running.unit, rule.quantity)
    except UnitError as exc:
        where = f"{rule.file}:line {rule.line}: " if rule.file else ""
        raise UnitError(f"{where}rule '{rule.id}' is stated in {rule.unit!r} but column "
                        f"'{running.column}' is recorded in {running.unit!r}: {exc}") from None


def round_cutoffs(stats: BinnedStats, min_rows: int = 50) -> list[float]:
    """Round values of the 1-2-5 series inside the bulk of the running variable's distribution."""
    st = stats.pooled()
    keep = st.n > 0
    x, n = st.x[keep], st.n[keep]
    if x.size < 2:
        return []
    lo, hi = weighted_quantile(x, n, [0.05, 0.95])
    span = hi - lo
    if not span > 0:
        return []
    step = nice_width(span, 8)
    steps = [step]
    coarse = 5 * 10 ** math.floor(math.log10(step)) if step > 0 else 0
    for s in (coarse, coarse * 10):
        if s > step and s <= span / 2:
            steps.append(s)
    values = set()
    for s in steps:
        k0, k1 = math.ceil(lo / s - 1e-9), math.floor(hi / s + 1e-9)
        for k in range(k0, k1 + 1):
            values.add(round(k * s, 12))
    support = np.unique(x) if st.kind == "exact" else None
    out = []
    spacing = float(np.median(np.diff(support))) if support is not None and support.size > 1 else 0.0
    reach = max(step, spacing) * (1 + 1e-9)
    for c in sorted(values):
        # On an exact support a cutoff between support points repeats the split at the next
        # support point, so only support values are kept.
        if support is not None and not np.isclose(support, c, rtol=0, atol=1e-9 * max(1, abs(c))).any():
            continue
        left = n[(x >= c - reach) & (x < c)].sum()
        right = n[(x >= c) & (x < c + reach)].sum()
        if left >= min_rows and right >= min_rows:
            out.append(float(c))
    return out
