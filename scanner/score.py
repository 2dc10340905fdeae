"""Sub-scores, flags, verdicts, q-values and ranking.

The composite score (0–100) is a weighted mean of named sub-scores in [0, 1]:

============  ======  =====================================================================
sub-score     weight  definition
============  ======  =====================================================================
strength      0.30    min(1, |jump| / 0.5) × min(1, F / 10)   (F = t² of the first stage)
density       0.15    g(density_p), g(p) = clip((log10 p + 3) / 2, 0, 1): 1 for p ≥ 0.1, 0 for p ≤ 0.001
balance       0.15    g(balance_p)
support       0.10    min(1, log10(min(n_left, n_right)) / 3) × min(1, min distinct values per side / 10)
placebo       0.10    share of placebo cutoffs whose |t| the real jump beats (1 − placebo_exceed / placebo_n)
heaping       0.10    0 with the heaping flag, else 1 (only for running variables with heaps)
stability     0.10    clip((4 − S) / 3, 0, 1): 1 for S ≤ 1, 0 for S ≥ 4 (S defined below)
============  ======  =====================================================================

Stability (our rule): for each sensitivity run v (0.5, 0.75, 1.5, 2 × h; donuts dropping the
1 and 2 support values nearest the cutoff) with conventional estimate τ_v and SE s_v, the shift
from the run at 1 × h (estimate τ, SE s) is standardised by the SE of a difference of nested estimates,
z_v = |τ_v − τ| / max(√|s_v² − s²|, s/2) (a Hausman-type approximation; the floor keeps near-equal
SEs from inflating z); the bias-corrected estimate (SE ``se_robust``) counts as one more run.
S = max_v z_v.  Flag ``unstable`` when S > 3 and the largest shift is
also practically large, max_v |τ_v − τ| / |τ| > 0.2.

A sub-score that could not be computed is left out and the weights of the others rescaled.

Flags and what they mean (each comes with a plain-words reason):

* ``weak`` — first-stage F below 104.7, the F a single-instrument IV needs for its usual 5%
  t-test to have size 5% (Lee, McCrary, Moreira & Porter 2022, AER 112(10), from memory); the
  older rule of thumb, F below 10 (Staiger & Stock 1997), still scales the strength sub-score.
  A fuzzy RD's effect is such an IV; and at the stricter bar a chance "jump" at a cutoff
  without one (|t| near 3) is never taken for a usable design.
* ``sorting`` — the density test the design calls for (``density_method``; rule in
  diagnostics/sorting.py) rejects a smooth density; ``density_q`` < alpha.
* ``imbalance`` — the covariate balance joint test rejects; ``balance_q`` < alpha.
* ``heaping`` — a heap within half a bandwidth of the cutoff, or a donut re-estimate without the
  heaped values that changes the answer (diagnostics/heaping.py).
* ``coarse`` — fewer than ``MIN_DISTINCT`` distinct running-variable values on a side within the
  bandwidth.
* ``thin`` — fewer than ``MIN_SIDE_ROWS`` rows on a side within the bandwidth.
* ``overlap`` — a stronger cutoff lies inside this candidate's window.

* ``impossible`` — a compliance share lies outside [0, 1] by more than 1.96 of its standard
  errors (diagnostics/compliance.py says why that can happen).

``density_q`` and ``balance_q`` are Holm (1979, Scand. J. Statist. 6(2)) adjusted p-values over
each contender's own design checks (its density test and its covariate balance test; contenders
are candidates whose first stage survives the scan's adjustment, q < alpha; see
``design_qvalues``); other candidates get neither flag.  Verdicts and the headline each rests on
are built in scanner/headline.py.  Candidates are ranked by verdict (usable, caution, doubtful,
inconclusive, no jump, not estimable) and then by score.  q-values are Benjamini–Hochberg (1995, JRSS B 57(1)) adjusted p-values over every
test actually run in the scan, counted as follows:

* each declared or round candidate with a finite p-value is one test (its own p-value);
* each discovered candidate is one test; its p-value is the held-out (half 1) p-value at the
  location found on half 0, and it exists only because its search-adjusted p-value on half 0
  was below alpha — a gate that makes the p-value conservative, P(p ≤ u) ≤ alpha·u, under no
  jump (without the split the search-adjusted p-value itself is used);
* each running variable × treatment grid scan that produced no discovered row (nothing found,
  or the break was attached to a declared/round candidate) is one test with the scan's
  search-adjusted p-value for sup |t|.  The grid points themselves are not separate tests: the
  sup-|t| critical value already accounts for all of them (``n_grid_points`` reports how many).

``n_tested`` is the size of that family.
"""
from __future__ import annotations

import math

import numpy as np

from .diagnostics.heaping import HEAP_P, HEAP_RATIO
from .textfmt import format_p, format_p_eq  # noqa: F401  (one formatter for every output)
from .headline import (PRACTICAL_JUMP, SHARE_BOUNDS, apply_headline, build_headline,
                       clip_intervals, is_share)

WEIGHTS = {"strength": 0.30, "density": 0.15, "balance": 0.15, "support": 0.10, "placebo": 0.10,
           "heaping": 0.10, "stability": 0.10}
UNSTABLE_Z = 3.0       # our rule, see the table above
UNSTABLE_REL = 0.2
VERDICTS = ("usable", "caution", "doubtful", "inconclusive", "no jump", "not estimable")
SERIOUS = {"sorting", "heaping", "imbalance", "overlap", "weak"}
F_WEAK = 10.0          # common practice: first-stage F below 10 is weak (Staiger & Stock 1997)
F_VALID_T = 104.7      # Lee, McCrary, Moreira & Porter (2022), from memory: the "weak" flag
MIN_DISTINCT = 5       # fewer distinct running-variable values per side inside h → "coarse"
MIN_SIDE_ROWS = 100
OVERLAP_Z = 3.0        # a neighbour counts as a rival only if its own jump is clear (|z| > 3)    # common practice: fewer rows per side inside h → "thin"


def bh_qvalues(p) -> np.ndarray:
    """Benjamini–Hochberg adjusted p-values; NaN p-values stay NaN and are not counted."""
    p = np.asarray(p, float)
    q = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    m = ok.sum()
    if m == 0:
        return q
    pv = p[ok]
    order = np.argsort(pv)
    ranked = pv[order] * m / np.arange(1, m + 1)
    adj = np.minimum.accumulate(ranked[::-1])[::-1]
    out = np.empty(m)
    out[order] = np.minimum(adj, 1.0)
    q[ok] = out
    return q


def _g(p):
    if p is None or not np.isfinite(p):
        return None
    return float(np.clip((math.log10(max(p, 1e-300)) + 3) / 2, 0, 1))


def stability(c: dict) -> tuple[float, float]:
    """(S, largest relative shift) over the row's sensitivity runs; NaN when there are none."""
    runs = c.get("sensitivity") or []
    # Compare with the run at 1 × h when present: same variance estimator as the other runs.
    base = next((v for v in runs if v.get("variant") == "h×1"), c)
    tau, se = base.get("jump", np.nan), base.get("se", np.nan)
    zs, rel = [], []
    if tau is None or se is None or not (np.isfinite(tau) and np.isfinite(se) and se > 0):
        return float("nan"), float("nan")
    for v in runs:
        if v is base:
            continue
        tv, sv = v.get("jump"), v.get("se")
        if tv is None or sv is None or not (np.isfinite(tv) and np.isfinite(sv)):
            continue
        zs.append(abs(tv - tau) / max(math.sqrt(abs(sv * sv - se * se)), se / 2))
        rel.append(abs(tv - tau) / max(abs(tau), 1e-12))
    # The bias-corrected estimate is one more run: when it disagrees with the conventional one
    # by many SEs and by much, the local polynomial does not fit at this bandwidth (a kink or
    # a neighbouring jump inside the window) and the answer depends on the estimator.
    tb, sb = c.get("jump_bc"), c.get("se_robust")
    if tb is not None and sb is not None and np.isfinite(tb) and np.isfinite(sb):
        zs.append(abs(tb - tau) / max(math.sqrt(abs(sb * sb - se * se)), se / 2))
        rel.append(abs(tb - tau) / max(abs(tau), 1e-12))
    if not zs:
        return float("nan"), float("nan")
    return float(max(zs)), float(max(rel))


def subscores(c: dict) -> dict:
    """Named sub-scores of one candidate row (None where not computable)."""
    out = {"strength": None, "density": _g(c.get("density_p")), "balance": _g(c.get("balance_p")),
           "support": None, "placebo": None, "heaping": None, "stability": None}
    if np.isfinite(c.get("jump", np.nan)):
        f = c.get("first_stage_f") or 0.0
        out["strength"] = float(min(1, abs(c["jump"]) / 0.5) * min(1, f / F_WEAK))
        nmin = min(c.get("n_left") or 0, c.get("n_right") or 0)
        dmin = min(c.get("distinct_left") or 0, c.get("distinct_right") or 0)
        out["support"] = float(min(1, math.log10(max(nmin, 1)) / 3) * min(1, dmin / 10))
        if c.get("placebo_n"):
            out["placebo"] = float(1 - c.get("placebo_exceed", 0) / c["placebo_n"])
        if c.get("heap_values"):
            out["heaping"] = 0.0 if heaped(c) else 1.0
    S = c.get("stability_z", np.nan)
    out["stability"] = float(np.clip((4 - S) / 3, 0, 1)) if S is not None and np.isfinite(S) else None
    return out


def composite(sub: dict) -> float:
    got = {k: v for k, v in sub.items() if v is not None}
    if "strength" not in got:
        return 0.0
    wsum = sum(WEIGHTS[k] for k in got)
    return round(100 * sum(WEIGHTS[k] * v for k, v in got.items()) / wsum, 1)


def _below(p, alpha) -> bool:
    return p is not None and np.isfinite(p) and p < alpha


def holm(p) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values; NaN p-values stay NaN and are not counted."""
    p = np.asarray(p, float)
    q = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = ok.size
    if m == 0:
        return q
    order = ok[np.argsort(p[ok])]
    adj = np.maximum.accumulate(p[order] * (m - np.arange(m)))
    q[order] = np.minimum(adj, 1.0)
    return q


def design_qvalues(rows: list[dict], alpha: float) -> None:
    """Adjusted p-values of the density and balance checks: each contender is its own family.

    Contenders are candidates whose first stage survives the scan's adjustment (q < alpha).
    A design check qualifies one candidate's design, and a missed rejection is the costly error
    (a design with sorting called "usable"), so each contender's checks are adjusted only among
    themselves — Holm (1979) over its density test and its covariate balance test — and the
    chance that a clean design gets a flag is at most alpha.  An adjustment across candidates
    would let a crowd of strong candidates hide a strong rejection at one of them (with 50
    contenders a Benjamini–Hochberg q of a density p of 0.004 is 0.2).  Other candidates get no
    sorting/imbalance flag (q-value None).
    """
    for r in rows:
        r["density_q"] = None
        r["balance_q"] = None
        if not _below(r.get("q_value"), alpha):
            continue
        q = holm([r.get("density_p", np.nan), r.get("balance_p", np.nan)])
        for field, v in zip(("density", "balance"), q):
            r[f"{field}_q"] = float(v) if np.isfinite(v) else None


def heaped(c: dict) -> bool:
    """A heap within half a bandwidth of the cutoff, or a donut that changes the answer."""
    near = c.get("heap_near")
    if near is None:       # rows built before the heap_near field existed
        near = (c.get("heap_p") is not None and c["heap_p"] < HEAP_P
                and (c.get("heap_ratio") or 0) >= HEAP_RATIO)
    return bool(near or c.get("donut_changes"))


def flags(c: dict, alpha: float) -> list[str]:
    """Short flag words for a candidate row."""
    out = []
    if not np.isfinite(c.get("jump", np.nan)) or c.get("no_variation"):
        return out
    if (c.get("first_stage_f") or 0) < F_VALID_T:
        out.append("weak")
    if _below(c.get("density_q", c.get("density_p")), alpha):
        out.append("sorting")
    if _below(c.get("balance_q", c.get("balance_p")), alpha):
        out.append("imbalance")
    if heaped(c):
        out.append("heaping")
    if min(c.get("distinct_left") or 0, c.get("distinct_right") or 0) < MIN_DISTINCT:
        out.append("coarse")
    if min(c.get("n_left") or 0, c.get("n_right") or 0) < MIN_SIDE_ROWS:
        out.append("thin")
    S, rel = c.get("stability_z", np.nan), c.get("stability_shift", np.nan)
    if np.isfinite(S) and S > UNSTABLE_Z and rel > UNSTABLE_REL:
        out.append("unstable")
    if c.get("impossible_share"):
        out.append("impossible")
    out.extend(f for f in c.get("extra_flags", []) if f not in out)
    return out


def verdict(c: dict, alpha: float) -> str:
    """The candidate's verdict word (scanner.headline.build_headline decides it)."""
    return build_headline(c, alpha, SERIOUS).verdict


def _fmt_f(f):
    """F for reading: a deterministic (sharp) first stage has an enormous F."""
    if f is None or not np.isfinite(f):
        return "n/a"
    return "> 9,999" if f > 9999 else f"{f:.1f}"


def reasons(c: dict, alpha: float) -> list[str]:
    """Plain-words reasons behind the verdict."""
    out = []
    if not np.isfinite(c.get("jump", np.nan)):
        return [f"could not be estimated: {c.get('reason') or 'unknown reason'}."]
    if c.get("no_variation"):
        v = (c.get("variation") or {}).get("value_left")
        return [f"{c['treatment']} is {v:.3g} on both sides of {c['running']} = {c['cutoff']:g} "
                "within the bandwidth: no variation, so there is nothing to test."]
    left, right = c["left"], c["right"]
    if is_share(c):   # fitted levels of a 0/1 column are shares: shown within [0, 1]
        left, right = (float(np.clip(v, *SHARE_BOUNDS)) for v in (left, right))
    out.append(f"uptake of {c['treatment']} jumps by {c['jump']:+.3f} at {c['running']} = "
               f"{c['cutoff']:g} (from {left:.2f} to {right:.2f}; F = {_fmt_f(c['first_stage_f'])}, "
               f"{format_p_eq('q', c['q_value'])}).")
    out.append(_headline_line(c))
    fl = c.get("flags", [])
    if "weak" in fl:
        out.append(f"the first stage is weak (F = {c['first_stage_f']:.1f} < {F_VALID_T:g}, "
                   "the F a usual 5% t-test of the effect needs).")
    if "sorting" in fl:
        how = (c.get("density_method") or "density test").replace("_", " ")
        how = how.replace(" without heaps", " test, heaps' excess removed")
        out.append(f"the density of {c['running']} changes {100 * (c['density_ratio'] - 1):+.0f}% at the "
                   f"cutoff ({how}, {format_p_eq('p', c['density_p'])}): people may be sorting around the line.")
    if "imbalance" in fl and c.get("balance_worst"):
        w = c["balance_worst"]
        out.append(f"covariate '{w['name']}' jumps by {w['std_jump']:+.2f} sd at the cutoff "
                   f"({format_p_eq('p', w['p_value'])}): groups either side differ beyond treatment.")
    if "heaping" in fl:
        if c.get("heap_near") or c.get("donut_changes") is None:
            out.append(f"a heap at {c['heap_value']:g} holds {c['heap_ratio']:.1f}× the rows of neighbouring "
                       "values: rounded or self-reported values sit on the line.")
        if c.get("donut_changes"):
            out.append(f"dropping the heaped values moves the jump from {c['jump']:+.3f} to "
                       f"{c['donut_jump']:+.3f} ({format_p_eq('p', c['donut_p'])}): the estimate leans on "
                       "rounded values.")
    if "coarse" in fl:
        out.append(f"only {min(c['distinct_left'], c['distinct_right'])} distinct values of "
                   f"{c['running']} on a side within the bandwidth: the running variable is coarse.")
    if "overlap" in fl:
        out.append(f"a stronger jump at {c['overlap_with']:g} lies inside this window, so this "
                   "estimate mostly picks up that one.")
    if "impossible" in fl and c.get("impossible_share"):
        out.append(f"{c['impossible_share']}.")
    if "thin" in fl:
        out.append("few rows near the cutoff on at least one side.")
    if "unstable" in fl:
        out.append(f"the estimate moves by up to {100 * c['stability_shift']:.0f}% "
                   f"({c['stability_z']:.1f} SE of the difference) when the bandwidth is halved or "
                   "doubled or the values nearest the cutoff are dropped.")
    if c.get("placebo_n") and c.get("placebo_exceed"):
        out.append(f"{c['placebo_exceed']} of {c['placebo_n']} placebo cutoffs away from the line show "
                   f"a jump at least as clear ({format_p_eq('placebo p', c['placebo_p'])}).")
    if c.get("share_compliers") is not None and np.isfinite(c["share_compliers"]) \
            and _below(c.get("q_value"), alpha):
        out.append(f"the threshold binds for {100 * c['share_compliers']:.0f}% at the cutoff "
                   f"(always-takers {100 * c['share_always']:.0f}%, never-takers "
                   f"{100 * c['share_never']:.0f}%).")
    for pw in c.get("power") or []:
        if pw.get("mde_itt") is not None and np.isfinite(pw["mde_itt"]):
            cm = pw.get("mde_complier")
            out.append(f"planned outcome '{pw['outcome']}': minimum detectable effect "
                       f"{pw['mde_itt']:.3g} (intent-to-treat)"
                       + (f", {cm:.3g} among compliers" if cm is not None and np.isfinite(cm) else "")
                       + f" at {100 * pw['power']:.0f}% power, alpha {pw['alpha']:g}.")
    if c.get("verdict") in ("inconclusive", "no jump"):
        q = c.get("q_value")
        adj = (f"not clear after adjusting for the {c.get('n_tested', 0)} cutoffs tested "
               f"({format_p_eq('q', q)} ≥ {alpha:g})" if q is not None and np.isfinite(q)
               else "not tested")
        iv = _iv(c.get("ci_low"), c.get("ci_high"))
        if c["verdict"] == "inconclusive":
            out.append(f"inconclusive: {adj}, yet the 95% interval {iv} includes a jump of "
                       f"±{PRACTICAL_JUMP:g} or more: the data cannot tell either way.")
        else:
            out.append(f"no jump of practical size: {adj}, and the 95% interval {iv} lies "
                       f"within ±{PRACTICAL_JUMP:g}.")
    return out


def _iv(lo, hi) -> str:
    ok = all(v is not None and np.isfinite(v) for v in (lo, hi))
    return f"[{lo:+.3f}, {hi:+.3f}]" if ok else "(none)"


def _headline_line(c: dict) -> str:
    """Where the headline numbers come from: estimate, interval, its centre, the rows."""
    h = c.get("headline") or {}
    kind = h.get("interval") or c.get("interval") or "conventional"
    bc = c.get("jump_bc")
    centre = (f", centred on the bias-corrected jump {bc:+.3f}" if kind == "robust"
              and bc is not None and np.isfinite(bc) else "")
    return (f"estimate {c['jump']:+.3f} (conventional); 95% {kind} interval "
            f"{_iv(c.get('ci_low'), c.get('ci_high'))}{centre}; rows: "
            f"{h.get('sample', 'all rows')}.")


def overlaps(rows: list[dict]) -> None:
    """Mark candidates whose window holds a stronger cutoff of the same running × treatment.

    The estimate at such a cutoff mostly picks up its neighbour's jump ("overlap" flag); the
    stronger candidate is named in ``overlap_with``.
    """
    groups: dict = {}
    for r in rows:
        if np.isfinite(r.get("z", np.nan)):
            groups.setdefault((r["running"], r["treatment"]), []).append(r)
    for group in groups.values():
        for r in group:
            h = r["bandwidth"]
            rivals = [o for o in group if o is not r and abs(o["cutoff"] - r["cutoff"]) < h
                      and abs(o["z"]) > max(abs(r["z"]), OVERLAP_Z)]
            if rivals:
                best = max(rivals, key=lambda o: abs(o["z"]))
                r.setdefault("extra_flags", []).append("overlap")
                r["overlap_with"] = best["cutoff"]


def finalize(rows: list[dict], alpha: float, extra_p=()) -> list[dict]:
    """Add q-values, flags, sub-scores, score, verdict, reasons and rank; return rows best first.

    ``extra_p`` holds p-values of tests that have no row (grid scans without a discovery); they
    enter the Benjamini–Hochberg family and ``n_tested``.
    """
    extra = [float(p) for p in extra_p]
    q = bh_qvalues([r.get("p_value", np.nan) for r in rows] + extra)
    tested = int(np.isfinite(q).sum())
    q = q[:len(rows)]
    overlaps(rows)
    for r, qv in zip(rows, q):
        r["stability_z"], r["stability_shift"] = stability(r)
        r["q_value"] = float(qv)
        r["n_tested"] = tested
    design_qvalues(rows, alpha)
    for r in rows:
        r["flags"] = flags(r, alpha)
        r["subscores"] = subscores(r)
        r["score"] = composite(r["subscores"])
        clip_intervals(r)
        apply_headline(r, build_headline(r, alpha, SERIOUS))
        if r.get("confirm_half"):     # the held-out fields as finally shown (clipped, labelled)
            r["confirm_half"] = {k: r.get(k) for k in r["confirm_half"]}
        r["reasons"] = reasons(r, alpha) + search_reasons(r)
    rows.sort(key=lambda r: (VERDICTS.index(r["verdict"]), -r["score"], r["running"],
                             r["treatment"], r["cutoff"]))
    for i, r in enumerate(rows, 1):
        r["rank"] = i
    return rows


def search_reasons(c: dict) -> list[str]:
    """Plain-words lines about the discovery search (origin "discovered" or a best-fit cutoff)."""
    d = c.get("discovery_half")
    if not d:
        return []
    where = (f"best fit at {d['location']:g} (95% set ({d['ci_low']:g}, {d['ci_high']:g}], "
             "a gap between recorded values)" if d.get("ci_low_open") else
             f"best fit at {d['location']:g} (95% set {d['ci_low']:g} to {d['ci_high']:g})")
    found = (f"|t| = {abs(d['t']):.1f} over {d['n_grid_points']} grid points, search-adjusted "
             f"{format_p_eq('p', d['search_p'])}")
    if c["origin"] != "discovered":
        return [f"{c['origin']} at {c['cutoff']:g}, {where}: the search ({found}) puts the break "
                "at or near this cutoff."]
    held = ("estimated and tested on the held-out half of the rows" if c.get("split")
            else "estimated on the same rows (no held-out half)")
    return [f"found by the search, not declared: {where}; {found}; {held}."]
