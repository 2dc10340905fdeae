"""Candidate cutoffs: declared (rule catalogues) and round numbers.

Round numbers follow a 1-2-5 series at the running variable's own scale: the step is the largest
1, 2 or 5 × 10^k not above 1/8 of the central 90% range, and candidates are the multiples of that
step (and of any coarser 5 × 10^k step) inside the 5th–95th percentile range, kept only where at
least ``min_rows`` rows lie within one step on each side.

Recorded values form a lattice when the running variable has exact-support bins (half-integer
birth quarters, a lab value recorded to 0.1).  A cutoff between two recorded values a < c < b
divides the rows as any value in (a, b] does:

* a **round** value between recorded values is examined as that split and reported at the round
  value (0 on a half-integer lattice is the split between −0.5 and 0.5); of several round values
  in one split the roundest is kept;
* a **declared** value between recorded values (typically a rule converted from another unit,
  190 mg/dL = 4.91337 mmol/L) is applied literally to the recorded values: every inequality,
  strict or not, puts a on one side and b on the other, so the candidate is the split (a, b).
  Its cutoff is the recorded value that states that split with the rule's own inequality — b
  for right-closed rules (x ≥ b), a for the others (x > a).  Rounding the declared value to
  the nearest recorded value first would move the split by a whole step whenever the value
  sits at or past the midpoint (a rule "above 6.5" on values 6.4, 6.6 would exclude 6.6).

Either way the row records ``cutoff_declared`` (the value before placement) and ``split_low`` /
``split_high``, the recorded values on either side of the split used, so a cutoff off the
lattice can be reported with both values.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

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
    cutoff_declared: float | None = None      # the value before placement on the lattice
    split_low: float | None = None            # recorded values either side of the split
    split_high: float | None = None

    def lattice_fields(self) -> dict:
        """Row fields saying where the cutoff sits against the recorded values (None: no lattice)."""
        return {"cutoff_declared": self.cutoff_declared, "split_low": self.split_low,
                "split_high": self.split_high}

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
    spacing = float(np.median(np.diff(support))) if support is not None and support.size > 1 else 0.0
    reach = max(step, spacing) * (1 + 1e-9)
    by_split = {}
    for c in sorted(values):
        left = n[(x >= c - reach) & (x < c)].sum()
        right = n[(x >= c) & (x < c + reach)].sum()
        if not (left >= min_rows and right >= min_rows):
            continue
        # On an exact support, values in one gap (a, b] split the rows alike: keep the roundest.
        key = int(np.searchsorted(support, c - 1e-9 * max(1, abs(c)))) if support is not None else c
        best = by_split.get(key)
        if best is None or _roundness(c, steps) > _roundness(best, steps):
            by_split[key] = c
    return [float(c) for c in sorted(by_split.values())]


def _roundness(c: float, steps) -> float:
    """The coarsest step (of the series, or a power of ten above it) that ``c`` is a multiple of."""
    best = 0.0
    top = max(steps)
    cands = list(steps) + [10.0 ** k for k in range(math.floor(math.log10(top)) + 1,
                                                     math.floor(math.log10(top)) + 4)]
    for s in cands:
        if abs(c / s - round(c / s)) < 1e-9:
            best = max(best, s)
    return best if c != 0 else math.inf


def split_of(stats: BinnedStats, c: float, right_closed: bool = True):
    """Recorded values (a, b) on either side of the split cutoff ``c`` makes on an exact support.

    None for fixed-width bins or a cutoff outside the recorded range.
    """
    st = stats.pooled()
    if st.kind != "exact":
        return None
    sup = np.unique(st.key[st.n > 0])
    j = int(np.searchsorted(sup, c, side="left" if right_closed else "right"))
    if j == 0 or j >= sup.size:
        return None
    return float(sup[j - 1]), float(sup[j])


def on_lattice(cand: Candidate, stats: BinnedStats) -> Candidate:
    """The candidate placed on the recorded values, with the lattice fields filled (module docstring).

    Declared cutoffs between two recorded values a < c < b become the split (a, b), stated as
    x ≥ b (right-closed rules) or x > a; round cutoffs keep their value.  A cutoff
    on a recorded value, off an exact support, or outside the recorded range is left as it is
    (lattice fields filled where a split exists).
    """
    st = stats.pooled()
    if st.kind != "exact":
        return cand
    sup = np.unique(st.key[st.n > 0])
    c = cand.cutoff
    tol = 1e-9 * max(1.0, abs(c))
    placed = c
    on_support = bool(np.isclose(sup, c, rtol=0, atol=tol).any())
    if cand.origin == "declared" and not on_support and sup[0] < c < sup[-1]:
        j = int(np.searchsorted(sup, c))
        a, b = float(sup[j - 1]), float(sup[j])
        placed = b if cand.right_closed else a
    elif on_support:
        placed = float(sup[np.argmin(np.abs(sup - c))])
    split = split_of(st, placed, cand.right_closed)
    if split is None:
        return cand
    return replace(cand, cutoff=float(placed), cutoff_declared=float(c),
                   split_low=split[0], split_high=split[1])
