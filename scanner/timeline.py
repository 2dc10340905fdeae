"""Jumps by calendar period and before/after an effective date, from period-keyed bins.

The binning pass keys every bin by calendar quarter (``period = year*4 + quarter − 1``, see
:func:`scanner.io.period_codes`), so every per-period fit below is a restriction of one
BinnedStats — the data are read once, not once per period.

* :func:`period_jumps` — the uptake jump at a cutoff in each quarter or year, same bandwidth
  and kernel throughout.  :func:`choose_granularity` picks quarters when the median quarter
  holds at least ``MIN_PERIOD_ROWS`` rows on the thinner side of the window, years otherwise
  (our choice: about the size at which a quarter's jump has a standard error near 0.05 for a
  0/1 uptake).
* :func:`diff_in_disc` — the difference-in-discontinuities of Grembi, Nannicini & Troiano
  (2016): the jump after the effective date minus the jump before it.  The quarter that
  contains the effective date mixes both regimes and is left out unless the date is the first
  day of that quarter.
"""
from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, asdict

import numpy as np

from .bins import BinnedStats
from .estimate.local import Z95, JumpFit, fit_jump, two_sided_p

MIN_PERIOD_ROWS = 200     # rows on the thinner side of c ± h in the median quarter (our choice)


def quarter_code(day: dt.date) -> int:
    """Period key of the quarter holding ``day`` (year*4 + quarter − 1, as the engines use)."""
    return day.year * 4 + (day.month - 1) // 3


def quarter_start(code: int) -> dt.date:
    return dt.date(code // 4, 3 * (code % 4) + 1, 1)


def period_label(code: int, granularity: str) -> str:
    return f"{code // 4}" if granularity == "year" else f"{code // 4}Q{code % 4 + 1}"


def _window_counts(stats: BinnedStats, column: str, cutoff: float, h: float, right_closed: bool):
    """Per period code: rows of ``column`` inside c ± h on the left and on the right."""
    keep = stats.period >= 0
    x = stats.x[keep] - cutoff
    n = stats.cnt[keep, stats.col(column)]
    per = stats.period[keep]
    inside = np.abs(x) < h
    right = x >= 0 if right_closed else x > 0
    codes = np.unique(per)
    left_n = np.array([n[(per == c) & inside & ~right].sum() for c in codes])
    right_n = np.array([n[(per == c) & inside & right].sum() for c in codes])
    return codes, left_n, right_n


def choose_granularity(stats: BinnedStats, column: str, cutoff: float, h: float,
                       right_closed: bool = True) -> str:
    """'quarter' when the median quarter has ≥ MIN_PERIOD_ROWS rows per side in the window, else 'year'."""
    codes, ln, rn = _window_counts(stats, column, cutoff, h, right_closed)
    if codes.size == 0:
        return "year"
    return "quarter" if float(np.median(np.minimum(ln, rn))) >= MIN_PERIOD_ROWS else "year"


def periods(stats: BinnedStats, granularity: str) -> list[tuple[int, list[int]]]:
    """(first quarter code, quarter codes) of each period present in the bins, in time order."""
    codes = np.unique(stats.period[stats.period >= 0])
    if granularity == "quarter":
        return [(int(c), [int(c)]) for c in codes]
    years = sorted({int(c) // 4 for c in codes})
    return [(y * 4, [int(c) for c in codes if c // 4 == y]) for y in years]


@dataclass(frozen=True)
class PeriodJump:
    """The jump at one cutoff in one calendar period."""

    period: str
    start: str
    cutoff: float
    jump: float
    se: float
    ci_low: float
    ci_high: float
    n_left: int
    n_right: int
    reason: str | None = None

    def to_dict(self) -> dict:
        return asdict(self)


def period_jumps(stats: BinnedStats, column: str, cutoff: float, bandwidth: float,
                 granularity: str, kernel: str = "triangular", degree: int = 1,
                 right_closed: bool = True) -> list[PeriodJump]:
    """Local polynomial jump at ``cutoff`` in each period, with one bandwidth for all periods.

    Parameters
    ----------
    stats : period-keyed BinnedStats of the running variable.
    column : tracked 0/1 treatment column.
    cutoff : cutoff on the running variable's scale.
    bandwidth : half-width of the window (running-variable units), shared by all periods so
        that the periods are compared on the same rows near the line.
    granularity : 'quarter' or 'year'.

    Returns
    -------
    One PeriodJump per period present in the data, in time order.

    Notes
    -----
    Each period is the sharp local polynomial fit of Hahn, Todd & van der Klaauw (2001) on the
    bins of that period (:func:`scanner.estimate.local.fit_jump`).
    """
    out = []
    for start, codes in periods(stats, granularity):
        st = stats.restrict(period=codes).pooled()
        f = fit_jump(st, column, cutoff, bandwidth, kernel, degree, right_closed)
        out.append(PeriodJump(period_label(start, granularity), quarter_start(start).isoformat(),
                              float(cutoff), f.jump, f.se, f.ci_low, f.ci_high, f.n_left,
                              f.n_right, f.reason))
    return out


@dataclass(frozen=True)
class DiscDiff:
    """Difference-in-discontinuities around a change date. NaN values come with a ``reason``."""

    change: str
    jump_before: float
    se_before: float
    jump_after: float
    se_after: float
    did: float
    did_se: float
    did_ci_low: float
    did_ci_high: float
    did_p: float
    n_before: int
    n_after: int
    left_out: str | None
    reason: str | None = None

    def to_dict(self) -> dict:
        return asdict(self)


def split_codes(stats: BinnedStats, change: dt.date) -> tuple[list[int], list[int], int | None]:
    """Quarter codes wholly before and wholly from ``change``, and the mixed quarter (or None)."""
    codes = [int(c) for c in np.unique(stats.period[stats.period >= 0])]
    q = quarter_code(change)
    mixed = None if change == quarter_start(q) else q
    before = [c for c in codes if c < q]
    after = [c for c in codes if c > q or (c == q and mixed is None)]
    return before, after, mixed


def _unscaled_var(f: JumpFit) -> float:
    """Sandwich variance of a jump without its HC1 factor n/(n − k)."""
    n, k = f.n_left + f.n_right, 2 * (f.degree + 1)
    return f.se ** 2 * (n - k) / n


def diff_in_disc(stats: BinnedStats, column: str, cutoff: float, bandwidth: float,
                 change: dt.date, kernel: str = "triangular", degree: int = 1,
                 right_closed: bool = True) -> DiscDiff:
    """Jump after ``change`` minus jump before it, with its heteroskedasticity-robust SE.

    Parameters
    ----------
    stats : period-keyed BinnedStats of the running variable.
    column : tracked 0/1 treatment column.
    cutoff, bandwidth : cutoff and window half-width (running-variable units), the same in
        both periods.
    change : the date the rule took effect (or stopped).

    Returns
    -------
    DiscDiff with the before and after jumps (each with its own HC1 SE) and their difference.

    Notes
    -----
    Grembi, Nannicini & Troiano (2016), AEJ: Applied 8(3): the coefficient on T·S in the fully
    interacted local linear regression ``y ~ (1 + S + x + S·x) × (1 + T)`` (S the side, T the
    after-period).  The regressions of the four cells separate, so the estimate is the
    difference of the two period jumps, and its HC1 sandwich variance is the sum of the four
    unscaled intercept variances times N/(N − 4(p+1)), N the rows with positive weight — equal
    to statsmodels' HC1 on the rows.  The paper clusters by unit; bins cannot, so repeated rows
    of one person are treated as independent (use keep = "first" for one row per person).
    """
    nan = float("nan")
    before, after, mixed = split_codes(stats, change)
    left_out = period_label(mixed, "quarter") if mixed is not None else None
    fits = []
    for codes in (before, after):
        if not codes:
            fits.append(None)
            continue
        fits.append(fit_jump(stats.restrict(period=codes).pooled(), column, cutoff, bandwidth,
                             kernel, degree, right_closed))
    fb, fa = fits
    nb = fb.n_left + fb.n_right if fb else 0
    na = fa.n_left + fa.n_right if fa else 0
    jb, sb = (fb.jump, fb.se) if fb else (nan, nan)
    ja, sa = (fa.jump, fa.se) if fa else (nan, nan)
    reason = None
    if fb is None or fa is None:
        reason = f"no data {'before' if fb is None else 'after'} {change.isoformat()}"
    elif fb.reason or fa.reason:
        reason = f"{'before' if fb.reason else 'after'}: {fb.reason or fa.reason}"
    if reason:
        return DiscDiff(change.isoformat(), jb, sb, ja, sa, nan, nan, nan, nan, nan, nb, na,
                        left_out, reason)
    k = 4 * (degree + 1)
    N = nb + na
    var = (_unscaled_var(fb) + _unscaled_var(fa)) * N / (N - k)
    did, se = ja - jb, float(np.sqrt(var))
    p = two_sided_p(did / se) if se > 0 else nan
    return DiscDiff(change.isoformat(), jb, sb, ja, sa, float(did), se, did - Z95 * se,
                    did + Z95 * se, p, nb, na, left_out)


def change_date(rule) -> dt.date | None:
    """The date a rule's regime changes: its start, else the day after its end."""
    if rule is None:
        return None
    if rule.effective_from:
        return rule.effective_from
    if rule.effective_to:
        return rule.effective_to + dt.timedelta(days=1)
    return None


def in_force_codes(stats: BinnedStats, rule) -> tuple[list[int], str] | None:
    """Quarter codes wholly inside the rule's effective dates, and a label for them.

    None when the rule has no dates, the bins have no period keys, or every period present is
    in force (then the pooled estimate is the in-force one).  A quarter the rule starts or
    stops in mid-way mixes both regimes and is left out, as in :func:`split_codes`.
    """
    if rule is None or not (rule.effective_from or rule.effective_to):
        return None
    codes = [int(c) for c in np.unique(stats.period[stats.period >= 0])]
    if not codes:
        return None
    lo, hi = -np.inf, np.inf
    if rule.effective_from:
        q = quarter_code(rule.effective_from)
        lo = q if rule.effective_from == quarter_start(q) else q + 1
    if rule.effective_to:
        q = quarter_code(rule.effective_to)
        hi = q if rule.effective_to + dt.timedelta(days=1) == quarter_start(q + 1) else q - 1
    keep = [c for c in codes if lo <= c <= hi]
    if not keep or len(keep) == len(codes):
        return None
    label = (f"{rule.effective_from.isoformat() if rule.effective_from else 'start'} to "
             f"{rule.effective_to.isoformat() if rule.effective_to else 'end of data'}; "
             f"{period_label(keep[0], 'quarter')}–{period_label(keep[-1], 'quarter')}")
    return keep, label


# No row counts: beside the in-force counts they could give small counts away by subtraction.
POOLED_FIELDS = ("jump", "se", "ci_low", "ci_high", "p_value", "jump_bc", "bandwidth")


BEFORE_AFTER_FIELDS = ("change_date", "jump_before", "se_before", "jump_after", "se_after", "did",
                       "did_se", "did_p", "did_reason")


def before_after(stats: BinnedStats, cand, bandwidth: float, kernel: str = "triangular",
                 degree: int = 1) -> dict:
    """Fields a scan adds for a declared candidate whose rule has an effective date.

    ``jump_before``, ``jump_after``, ``did`` and ``did_se`` (plus ``se_before``, ``se_after``,
    ``did_p``, ``change_date`` and ``did_reason``); empty when the rule has no date or the bins
    have no period keys.
    """
    day = change_date(cand.rule)
    if day is None or not (stats.period >= 0).any() or not np.isfinite(bandwidth):
        return {}
    d = diff_in_disc(stats, cand.treatment, cand.cutoff, bandwidth, day, kernel, degree,
                     cand.right_closed)
    return {k: getattr(d, "change" if k == "change_date" else "reason" if k == "did_reason" else k)
            for k in BEFORE_AFTER_FIELDS}


__all__ = ["in_force_codes", "POOLED_FIELDS", "quarter_code", "choose_granularity", "period_jumps", "diff_in_disc", "before_after",
           "change_date", "PeriodJump", "DiscDiff"]
