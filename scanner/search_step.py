"""Discovery in a scan: every running variable × treatment searched for undeclared cutoffs,
each break found estimated and tested on the held-out half (split out of scanner.scan)."""
from __future__ import annotations

import numpy as np

from .candidates import Candidate
from .spec import ScanSpec

_CONFIRM_KEYS = ("jump", "se", "ci_low", "ci_high", "interval", "p_value", "conventional_p",
                 "bias_bound", "z", "bandwidth", "n_left", "n_right", "distinct_left",
                 "distinct_right", "left", "right", "reason")


def pair_searches(stats: dict, spec: ScanSpec, runnings=None, screen: bool = False) -> dict:
    """The discovery search (scanner.breaks.search_pair) of every running variable × treatment,
    or of those of the running variables in ``runnings``: {(running, treatment): PairSearch}.

    With ``spec.confirm`` the search runs on half 0 of the seeded split.  Each pair's seed is
    ``spec.seed`` plus its position in the spec, so a pair's search is the same whichever
    process runs it.
    """
    from .breaks import search_pair
    split = spec.confirm and any((st.half >= 0).any() for st in stats.values())
    out, k = {}, 0
    for r in spec.running:
        trs = list(r.treatments or spec.treatments)
        if runnings is not None and r.column not in runnings:
            k += len(trs)
            continue
        st = stats[r.column]
        find = st.restrict(half=0).pooled() if split else st.pooled()
        for t in trs:
            k += 1
            out[(r.column, t)] = search_pair(find, t, spec.alpha, spec.kernel, spec.min_rows,
                                             seed=spec.seed + k, screen=screen)
    return out


def discovery_step(stats: dict, rows: list, spec: ScanSpec, progress=None,
                   screen: bool = False, searches: dict | None = None) -> tuple[list, dict]:
    """Search every running variable × treatment for undeclared cutoffs (scanner.breaks).

    With ``spec.confirm`` (default) the search runs on half 0 of the seeded split and every
    break it finds is estimated and tested on half 1 (Card, Mas & Rothstein 2008), each break on
    its own.  A break next to a declared or round candidate of the same pair is reported on that
    candidate (``best_fit_cutoff``) instead of a new row.  ``screen`` is for simulation studies
    (see scanner.breaks.search_pair).  ``searches``: the searches already run
    (:func:`pair_searches`, e.g. in the candidate loop's processes); the rest are run here.

    A discovered row's ``jump``, ``se``, ``ci_low``/``ci_high`` and ``p_value`` all come from
    the held-out half: the p-value and interval allow for the worst-case smoothing bias
    (``interval`` = "bias-bounded"), and ``confirm_half`` repeats exactly those fields.
    Appends discovered rows to ``rows``; returns the p-values of the search tests that produced
    no row — every step of the sequential search is one test in the q-value family (see
    scanner.score): a step whose break became a row is counted by that row's held-out p-value;
    a step whose break was attached to a declared/round candidate, and the last step that found
    nothing more, by their search-adjusted p-values.
    """
    from .breaks import near_candidate
    split = spec.confirm and any((st.half >= 0).any() for st in stats.values())
    extra_p, pairs, n_grid, cache1 = [], [], 0, {}
    searches = dict(searches or {})
    todo = {r.column for r in spec.running
            if any((r.column, t) not in searches for t in (r.treatments or spec.treatments))}
    if todo:
        from .scan import one_blas_thread
        with one_blas_thread():
            searches.update(pair_searches(stats, spec, todo, screen))
    for r in spec.running:
        st = stats[r.column]
        test = st.restrict(half=1).pooled() if split else st.pooled()
        for t in (r.treatments or spec.treatments):
            ps = searches[(r.column, t)]
            n_grid += ps.n_grid_points
            pairs.append(ps.to_dict())
            own = [x for x in rows if x["running"] == r.column and x["treatment"] == t
                   and x["origin"] in ("declared", "round")]
            for pk in ps.peaks:
                j = near_candidate(pk, [x["cutoff"] for x in own], [x["origin"] for x in own])
                loc = dict(location=pk.location, location_ci_low=pk.ci_low,
                           location_ci_high=pk.ci_high, location_ci_low_open=pk.ci_low_open,
                           search_p=pk.search_p, search_step=pk.step, discovery_half=pk.to_dict())
                if j is not None:
                    own[j].update(best_fit_cutoff=pk.location, **loc)
                    extra_p.append(pk.search_p)
                    continue
                rows.append(_confirmed_row(test, Candidate(r.column, t, pk.location, "discovered"),
                                           pk, spec, cache1, split, loc))
            extra_p.extend(x["search_p"] for x in ps.tests[len(ps.peaks):])
            if progress:
                progress("discover", 1, None)
    return extra_p, {"n_grid_points": n_grid, "n_scans": len(pairs), "split": bool(split),
                     "split_by": (spec.unit or "row position") if split else None,
                     "seed": spec.seed, "pairs": pairs,
                     "n_search_tests": sum(len(p["steps"]) for p in pairs)}


def _confirmed_row(test, cand: Candidate, pk, spec: ScanSpec, cache: dict, split: bool,
                   loc: dict) -> dict:
    """Estimate and test one discovered break on the held-out half.

    A search seeks out curvature that looks like a jump, so the test allows for the worst-case
    smoothing bias B̄ (scanner.discover.bias_bound): p = P(|N(b, 1)| ≥ |t|) and the interval
    jump ± cv·se with cv the 1 − alpha quantile of |N(b, 1)|, b = B̄/se (Armstrong & Kolesár 2020,
    the fixed-length interval; Kolesár & Rothe 2018), so the interval and p tell one story.
    """
    from scipy import stats as sps
    from .discover import bias_bound
    from .scan import evaluate
    row = evaluate(test, cand, spec, cache)
    row.update(loc, split=bool(split))
    bb = bias_bound(test, cand.treatment, cand.cutoff, row["bandwidth"], spec.kernel)
    # conventional: the jump's own t against N(0, 1), no allowance for the smoothing bias
    t = row["jump"] / row["se"] if row["se"] > 0 else float("nan")
    row.update(conventional_p=float(2 * sps.norm.sf(abs(t))), bias_bound=bb.bound,
               curvature_bound=bb.curvature)
    pb = bb.p_value(row["jump"], row["se"])
    if np.isfinite(row["jump"]) and not np.isfinite(bb.curvature):
        # A searched location needs a bias allowance, and with too few support values a side
        # near it (or a singular quadratic fit) the curvature cannot be bounded: no test
        # rather than one without it.
        row.update(p_value=float("nan"), ci_low=float("nan"), ci_high=float("nan"),
                   interval="none",
                   inference_reason="too few support values on a side to fit a quadratic near "
                   "the location: the curvature, so the bias of a searched location, cannot be "
                   "bounded")
    if np.isfinite(pb):
        from .headline import bias_bounded_interval
        ps = pb
        if not split:
            # Same rows for search and estimate: the search's own null of sup |t|, at this
            # row's |t|, bounds the p-value too — the interval takes its critical value
            # (headline.bias_bounded_interval), so p < alpha exactly when it excludes 0.
            null = getattr(pk, "null", None)
            ps = max(pb, null.p_value(t) if null is not None else pk.search_p)
        row.update(p_value=ps, interval="bias-bounded")
        row["ci_low"], row["ci_high"] = bias_bounded_interval(row, spec.alpha)
    elif not split:
        row["p_value"] = max(row["p_value"], pk.search_p)
    row["confirm_half"] = {key: row.get(key) for key in _CONFIRM_KEYS} if split else None
    return row
