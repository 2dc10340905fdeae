"""The headline of a candidate: one estimate, one interval, one p, one q and one verdict.

A candidate row carries many estimates (conventional, bias-corrected, bias-aware, per period,
pooled, per half).  The headline says which of them the verdict rests on, and is built in one
place, :func:`build_headline`, from one sample and one method:

* declared and round candidates: the rows of the scan (for a rule with effective dates, the
  periods it was in force — the pooled estimate stays beside it as ``jump_pooled``); the
  interval is the one ``interval`` names (robust bias-corrected by default, bias-aware for a
  coarse running variable) and the p-value is the test that interval inverts;
* discovered candidates: the held-out half; the p-value allows for the worst-case smoothing
  bias of a searched location, and the interval is the one that test inverts,
  ``τ̂ ± cv(B̄/se)·se`` with cv the 1 − α quantile of |N(B̄/se, 1)| (Armstrong & Kolesár 2020,
  Quantitative Economics 11(1)), so estimate, interval and p agree.

Verdict words (our own):

* ``usable`` / ``caution`` / ``doubtful`` — the jump survives the scan's multiple-testing
  adjustment (q < alpha); no flag, a minor flag, or a serious flag.
* ``inconclusive`` — q ≥ alpha, and the 95% interval holds both zero and a jump of practical
  size (|jump| ≥ ``PRACTICAL_JUMP``): the data cannot tell.
* ``no jump`` — q ≥ alpha and the interval rules out a jump of practical size, or there is no
  variation at all in the window (both sides constant at the same value; no test is run).
* ``not estimable`` — no estimate, with a reason.

Bounds: a 0/1 treatment's levels are shares in [0, 1] and its jump a difference of shares in
[−1, 1]; every stored interval of such a jump is clipped to [−1, 1] (``bounded`` records it),
since no value outside is possible.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np


PRACTICAL_JUMP = 0.10   # our choice: 10 percentage points of uptake (treatment units)
JUMP_BOUNDS = (-1.0, 1.0)
SHARE_BOUNDS = (0.0, 1.0)
# Interval pairs stored on a row: (low field, high field).
INTERVAL_FIELDS = (("ci_low", "ci_high"), ("ci_low_robust", "ci_high_robust"),
                   ("ci_low_conventional", "ci_high_conventional"),
                   ("ci_low_honest", "ci_high_honest"), ("ci_low_pooled", "ci_high_pooled"))
METHODS = {
    "robust": "robust bias-corrected interval and p (Calonico, Cattaneo & Titiunik 2014)",
    "honest": "bias-aware interval and p (Armstrong & Kolesár 2020; Kolesár & Rothe 2018)",
    "bias-bounded": "interval and p allowing the worst-case bias of a searched location",
    "conventional": "conventional interval and p (HC1 sandwich)",
    "none": "no test: no variation in the window",
}


@dataclass(frozen=True)
class Headline:
    """What a candidate's verdict rests on, and where each number came from.

    ``estimate`` is the conventional local polynomial jump; ``estimate_bc`` the bias-corrected
    one the robust interval is centred on (NaN when the interval is not the robust one);
    ``interval`` names the interval and the p-value's method; ``sample`` the rows used.
    """

    estimate: float
    estimate_bc: float
    ci_low: float
    ci_high: float
    interval: str
    p_value: float
    q_value: float
    verdict: str
    verdict_reason: str
    sample: str
    method: str
    practical_jump: float
    bounded: tuple | None = None

    def to_dict(self) -> dict:
        d = asdict(self)
        d["bounded"] = list(self.bounded) if self.bounded else None
        return d


def _finite(v) -> bool:
    return v is not None and isinstance(v, (int, float, np.floating)) and np.isfinite(v)


def is_share(row: dict) -> bool:
    """The treatment is 0/1 in the window (its levels are shares)."""
    return bool((row.get("variation") or {}).get("binary"))


def clip_intervals(row: dict) -> None:
    """Clip every stored interval of a 0/1 treatment's jump to [−1, 1] (and its runs')."""
    if not is_share(row):
        return
    lo, hi = JUMP_BOUNDS
    for a, b in INTERVAL_FIELDS:
        for k in (a, b):
            if _finite(row.get(k)):
                row[k] = float(min(max(row[k], lo), hi))
    for run in row.get("sensitivity") or []:
        for k in ("ci_low", "ci_high"):
            if _finite(run.get(k)):
                run[k] = float(min(max(run[k], lo), hi))


def bias_bounded_interval(row: dict, alpha: float = 0.05) -> tuple[float, float]:
    """``τ̂ ± cv(B̄/se)·se``: the interval a discovered row's bias-allowing p-value inverts
    (Armstrong & Kolesár 2020, fixed-length interval); without a held-out half cv is at least
    the search's sup-|t| critical value."""
    jump, se, bound = row.get("jump"), row.get("se"), row.get("bias_bound")
    if not (_finite(jump) and _finite(se) and _finite(bound) and se > 0):
        return float("nan"), float("nan")
    from .estimate.robust import honest_cv   # here, so the report can rebuild without scipy.stats
    cv = honest_cv(bound / se, alpha)
    crit = (row.get("discovery_half") or {}).get("critical")
    if not row.get("split") and _finite(crit):
        # Searched and estimated on the same rows: the p-value is the larger of the bias-bounded
        # and the search-adjusted one (search_step), so the interval takes the larger critical
        # value too — the search's sup-|t| quantile at this level — and keeps telling the story
        # the p-value tells.
        cv = max(cv, float(crit))
    return float(jump - cv * se), float(jump + cv * se)


def _sample(row: dict) -> str:
    if row.get("origin") == "discovered":
        return "held-out half" if row.get("split") else "all rows (also searched)"
    if row.get("in_force"):
        return f"periods the rule was in force ({row['in_force']})"
    return "all rows"


def _interval(row: dict, alpha: float) -> tuple[str, float, float]:
    if row.get("no_variation"):
        return "none", float("nan"), float("nan")
    if row.get("origin") == "discovered" and _finite(row.get("bias_bound")):
        lo, hi = bias_bounded_interval(row, alpha)
        if is_share(row):
            lo, hi = max(lo, JUMP_BOUNDS[0]), min(hi, JUMP_BOUNDS[1])
        return "bias-bounded", lo, hi
    kind = row.get("interval") or "conventional"
    return kind, row.get("ci_low", float("nan")), row.get("ci_high", float("nan"))


def _verdict(row: dict, lo, hi, alpha: float, serious) -> tuple[str, str]:
    if not _finite(row.get("jump")):
        return "not estimable", f"could not be estimated: {row.get('reason') or 'unknown reason'}"
    if row.get("no_variation"):
        return "no jump", "no variation: every row on both sides of the window has the same value"
    if not _finite(row.get("p_value")) and not (_finite(lo) and _finite(hi)):
        return "inconclusive", f"no test: {row.get('inference_reason') or 'no p-value'}"
    q = row.get("q_value")
    if _finite(q) and q < alpha:
        fl = set(row.get("flags") or [])
        if fl & serious:
            return "doubtful", "clear jump, serious flag: " + ", ".join(sorted(fl & serious))
        if fl:
            return "caution", "clear jump, minor flag: " + ", ".join(sorted(fl))
        return "usable", "clear jump after the multiple-testing adjustment, no flag"
    if _finite(lo) and _finite(hi) and -PRACTICAL_JUMP < lo and hi < PRACTICAL_JUMP:
        return "no jump", (f"the interval rules out a jump of ±{PRACTICAL_JUMP:g} or more")
    return "inconclusive", (f"the interval holds both zero and a jump of ±{PRACTICAL_JUMP:g} or "
                            "more: the data cannot tell")


def build_headline(row: dict, alpha: float, serious=frozenset()) -> Headline:
    """The headline of one candidate row (after its q-value and flags are set).

    Parameters
    ----------
    row : a candidate row with its estimates, ``q_value`` and ``flags``.
    alpha : the scan's level.
    serious : flag words that make a clear jump "doubtful" (score.SERIOUS).

    Returns
    -------
    Headline, frozen.  Its interval is the stored ``ci_low``/``ci_high`` for declared and round
    candidates and the bias-bounded interval for discovered ones (module docstring).
    """
    kind, lo, hi = _interval(row, alpha)
    verdict, why = _verdict(row, lo, hi, alpha, serious)
    bc = row.get("jump_bc") if kind == "robust" else float("nan")
    nan = float("nan")
    return Headline(
        estimate=float(row["jump"]) if _finite(row.get("jump")) else nan,
        estimate_bc=float(bc) if _finite(bc) else nan,
        ci_low=float(lo) if _finite(lo) else nan, ci_high=float(hi) if _finite(hi) else nan,
        interval=kind,
        p_value=float(row["p_value"]) if _finite(row.get("p_value")) else nan,
        q_value=float(row["q_value"]) if _finite(row.get("q_value")) else nan,
        verdict=verdict, verdict_reason=why, sample=_sample(row),
        method=(f"no test: {row['inference_reason']}" if kind == "none"
                and row.get("inference_reason") and not row.get("no_variation")
                else METHODS.get(kind, kind)), practical_jump=PRACTICAL_JUMP,
        bounded=JUMP_BOUNDS if is_share(row) else None)


def apply_headline(row: dict, h: Headline) -> None:
    """Write the headline into the row's stable results.json fields (and ``headline``)."""
    row["headline"] = h.to_dict()
    row["verdict"] = h.verdict
    row["interval"] = h.interval
    row["ci_low"], row["ci_high"] = h.ci_low, h.ci_high
