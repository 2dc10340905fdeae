"""Scan orchestration: read → bin (one pass) → candidates → estimates & diagnostics → score.

Everything after the binning pass works on BinnedStats only.
"""
from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from . import __version__
from .bins import BinnedStats
from .candidates import Candidate, declared, round_cutoffs
from .diagnostics import covariate_balance
from .diagnostics.design import design_checks
from .engines import BinPlan, bin_table
from .errors import InputError
from .estimate import fit_jump, side_data
from .estimate.inference import inference_fields
from .estimate.local import floor_variance
from .estimate.select import select_bandwidth
from .guards import (add_cleaning_info, checked_rules, evaluate_contained, explain_nan,
                     keep_first, roles, text_columns, unit_repeats)
from .io import cleaned, open_table
from .rules import load_rules
from .score import MIN_DISTINCT, finalize
from .spec import ScanSpec, load_spec, parse_spec
from .timeline import BEFORE_AFTER_FIELDS, POOLED_FIELDS, before_after, in_force_codes


@dataclass
class ScanResult:
    """The outcome of a scan: candidate rows (best first), data accounting and the spec."""

    spec: ScanSpec
    rows: list
    data: dict
    stats: dict = field(default_factory=dict, repr=False)
    notes: list = field(default_factory=list)
    created: str = ""
    search: dict = field(default_factory=dict)

    @property
    def candidates(self):
        """Candidates as a pandas DataFrame, one tidy row per candidate (best first)."""
        import pandas as pd
        from .report.outputs import tidy_rows
        return pd.DataFrame(tidy_rows(self.to_dict()["candidates"]))

    def to_dict(self) -> dict:
        from .report.outputs import clean, results_dict
        d = results_dict(self)
        d["n_grid_points"] = int(self.search.get("n_grid_points", 0))
        d["search"] = clean(self.search)
        return d

    def to_json(self, path) -> None:
        from .report.outputs import write_json
        write_json(self.to_dict(), Path(path))

    def to_frame(self):
        return self.candidates

    def report(self, path) -> None:
        from .report.html import write_report
        write_report(self.to_dict(), Path(path), self.stats)

    def summary(self, top: int = 10) -> str:
        lines = [f"{self.spec.title}: {len(self.rows)} candidates from {self.data['rows_read']:,} rows"]
        for r in self.rows[:top]:
            lines.append(f"{r['rank']:>3}. {r['running']} × {r['treatment']} at {r['cutoff']:g} "
                         f"[{r['origin']}] jump {r['jump']:+.3f} q={r['q_value']:.2g} "
                         f"score {r['score']:.0f} {r['verdict']}"
                         + (f" ({', '.join(r['flags'])})" if r['flags'] else ""))
        return "\n".join(lines)


def _as_spec(spec_or_path) -> ScanSpec:
    if isinstance(spec_or_path, ScanSpec):
        return spec_or_path
    if isinstance(spec_or_path, dict):
        return parse_spec(spec_or_path)
    return load_spec(spec_or_path)


def _check_columns(table, spec: ScanSpec) -> None:
    for r in spec.running:
        table.require(r.column, "running variable")
    for t in spec.treatments:
        table.require(t, "treatment")
    for c in spec.covariates:
        table.require(c, "covariate")
    for c in spec.outcomes:
        table.require(c, "outcome")
    if spec.date:
        table.require(spec.date, "date")
    if spec.unit:
        table.require(spec.unit, "unit")
    for c in spec.missing_by_column:
        table.require(c, "data.missing_by_column")
    for r in spec.running:
        for t in r.treatments or ():
            if t not in spec.treatments:
                raise InputError(f"{spec.path or '<spec>'}: running variable '{r.column}' lists "
                                 f"treatment '{t}', which is not under [treatments] columns.")


def open_for_scan(spec: ScanSpec, data=None):
    """Open the table a spec names (or ``data``), check its columns and wrap it for cleaning.

    Returns ``(table, engine, notes)``; a Spark DataFrame passes through to the Spark engine.
    """
    notes = []
    engine = spec.engine
    if data is not None and type(data).__module__.startswith("pyspark"):
        return data, "spark", notes
    if data is None:
        if not spec.source:
            raise InputError(f"{spec.path or '<spec>'}: no data: set data.source in the spec "
                             "or pass data= to scan().")
        table = open_table(spec.resolve(spec.source), text_columns=text_columns(spec))
    else:
        table = open_table(data)
    _check_columns(table, spec)
    warn = unit_repeats(table, spec)
    if warn:
        notes.append(warn)
    return cleaned(table, spec.codes(), roles(spec), spec.date, spec.date_format), engine, notes


def scan(spec_or_path, data=None, progress=None) -> ScanResult:
    """Screen a table for regression-discontinuity candidates.

    Parameters
    ----------
    spec_or_path : a ScanSpec, a spec dict, or the path of a TOML spec.
    data : optional pandas DataFrame, pyarrow Table or Spark DataFrame; otherwise the spec's
        ``data.source`` is read.
    progress : optional callable ``progress(stage, advance, total)`` for progress bars.

    Returns
    -------
    ScanResult with candidates best first.
    """
    spec = _as_spec(spec_or_path)
    table, engine, notes = open_for_scan(spec, data)
    coded = getattr(table, "coded", None) or {}     # filled as batches are read; kept past keep-first
    rules = checked_rules([spec.resolve(c) for c in spec.catalogues]) if spec.catalogues else []
    columns = tuple(dict.fromkeys(spec.treatments + spec.covariates + spec.outcomes))
    pairs = tuple((t, y) for t in spec.treatments for y in spec.outcomes if y != t)
    plan = BinPlan(running=tuple(r.column for r in spec.running), columns=columns,
                   treatments=spec.treatments, pairs=pairs,
                   bin_width={r.column: r.bin_width for r in spec.running if r.bin_width},
                   date=spec.date,
                   split_seed=(spec.seed if spec.discover and spec.confirm and engine != "spark"
                               else None),
                   split_unit=spec.unit, batch_rows=spec.batch_rows)
    deduped = no_unit = 0
    if spec.discover and spec.confirm and engine == "spark":
        notes.append("warning: the Spark engine has no row positions for the held-out half, so "
                     "discovered cutoffs are tested with the search-adjusted p-value on all rows.")
    if spec.keep == "first" and engine == "spark":
        raise InputError(f"{spec.path or '<spec>'}: keep = 'first' is not available with the Spark "
                         "engine; deduplicate the DataFrame first (e.g. a window over data.unit).")
    if spec.keep == "first" and engine == "local":
        table, deduped, no_unit = keep_first(table, spec, plan.needed)
    tick = (lambda m: progress("bin", m, getattr(table, "num_rows", None))) if progress else None
    binned = bin_table(table, plan, engine=engine, progress=tick)
    for r in spec.running:
        if binned.stats[r.column].total == 0:
            raise InputError(f"{getattr(table, 'name', 'table')}: running variable '{r.column}' "
                             "has no usable values (all missing or not finite).")
        if binned.stats[r.column].distinct_values() < 2:
            raise InputError(f"{getattr(table, 'name', 'table')}: running variable '{r.column}' is "
                             "constant; a cutoff needs values on both sides — drop it from the spec.")
    cands = []
    for r in spec.running:
        trs = list(r.treatments or spec.treatments)
        dec, why = declared(r, trs, rules)
        notes.extend(why)
        cands.extend(dec)
        if spec.round_numbers:
            taken = {(c.treatment, c.cutoff) for c in dec}
            for c in round_cutoffs(binned.stats[r.column].pooled(), spec.min_rows):
                for t in trs:
                    if (t, c) not in taken:
                        cands.append(Candidate(r.column, t, c, "round"))
    rows, density_cache = [], {}
    pooled = {r: st.pooled() for r, st in binned.stats.items()}
    for i, c in enumerate(cands):
        row = evaluate_contained(evaluate, pooled[c.running], c, spec, density_cache)
        force = in_force_codes(binned.stats[c.running], c.rule)
        if force is not None:
            # A dated rule: the headline comes from the periods it was in force; pooled beside.
            st = binned.stats[c.running].restrict(period=force[0]).pooled()
            key = ("in force", c.running, tuple(force[0]))
            alone = evaluate_contained(evaluate, st, c, spec, density_cache.setdefault(key, {}))
            alone.update({f"{k}_pooled": row.get(k) for k in POOLED_FIELDS}, in_force=force[1])
            row = alone
        # Declared rules with an effective date: jumps before/after it from the period keys.
        row.update(dict.fromkeys(BEFORE_AFTER_FIELDS))
        if c.rule is not None and np.isfinite(row.get("bandwidth", np.nan)):
            row.update(before_after(binned.stats[c.running], c, row["bandwidth"], spec.kernel,
                                    spec.degree))
        rows.append(row)
        if progress:
            progress("estimate", 1, len(cands))
    for row in rows:
        explain_nan(row)
    extra_p, search = [], {"n_grid_points": 0, "pairs": []}
    if spec.discover:
        extra_p, search = discovery_step(binned.stats, rows, spec, progress)
    rows = finalize(rows, spec.alpha, extra_p)
    data_info = _data_info(binned, spec, deduped)
    add_cleaning_info(data_info, coded, spec, no_unit)
    return ScanResult(spec, rows, data_info, binned.stats, notes,
                      dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"), search)


def _data_info(binned, spec: ScanSpec, deduped: int) -> dict:
    dropped = []
    if deduped:
        dropped.append({"column": spec.unit, "treatment": None,
                        "reason": "repeat rows of a unit (keep = first)", "rows": deduped})
    for r in spec.running:
        col = r.column
        if binned.missing[col]:
            dropped.append({"column": col, "treatment": None, "reason": "running variable missing",
                            "rows": binned.missing[col]})
        if binned.nonfinite[col]:
            dropped.append({"column": col, "treatment": None,
                            "reason": "running variable not finite", "rows": binned.nonfinite[col]})
        st = binned.stats[col]
        for t in (r.treatments or spec.treatments):
            miss = int(st.total - st.cnt[:, st.col(t)].sum())
            if miss:
                dropped.append({"column": col, "treatment": t, "reason": "treatment missing",
                                "rows": miss})
    return {"rows_read": binned.rows_read + deduped, "rows_used": binned.rows_read,
            "dropped": dropped,
            "bins": {r.column: {"kind": binned.stats[r.column].kind,
                                "width": binned.stats[r.column].width,
                                "n_bins": binned.stats[r.column].n_bins}
                     for r in spec.running}}


def evaluate(stats: BinnedStats, cand: Candidate, spec: ScanSpec, density_cache: dict) -> dict:
    """All estimates and diagnostics for one candidate, as a flat dict."""
    t, c = cand.treatment, cand.cutoff
    d = side_data(stats, t, c, cand.right_closed)
    sel = select_bandwidth(d, spec.bandwidth, spec.kernel, spec.degree, spec.per_side, MIN_DISTINCT)
    h = (sel.h_left + sel.h_right) / 2   # diagnostics below use one window
    # A side with no variation in the window gets a variance that cannot vanish (local.py).
    d, variation = floor_variance(d, sel.h_left, sel.h_right)
    fit = fit_jump(stats, t, c, sel.h_left, spec.kernel, spec.degree, cand.right_closed, data=d,
                   bandwidth_right=sel.h_right)
    row = {
        "running": cand.running, "treatment": t, "cutoff": float(c), "origin": cand.origin,
        "rule_id": cand.rule_id, "eligible_side": cand.eligible_side,
        "rule_description": cand.rule.description if cand.rule else None,
        "jump": fit.jump, "se": fit.se, "ci_low": fit.ci_low, "ci_high": fit.ci_high,
        "p_value": fit.p_value, "z": fit.z, "first_stage_f": fit.z ** 2 if np.isfinite(fit.z) else float("nan"),
        "left": fit.left, "right": fit.right, "slope_left": fit.slope_left,
        "slope_right": fit.slope_right, "bandwidth": fit.bandwidth, "bandwidth_method": sel.method,
        "bandwidth_note": sel.note, "kernel": spec.kernel, "degree": spec.degree,
        "n_left": fit.n_left, "n_right": fit.n_right, "distinct_left": fit.distinct_left,
        "distinct_right": fit.distinct_right, "reason": fit.reason,
        "right_closed": cand.right_closed, "variation": variation.to_dict(),
    }
    if variation.none and np.isfinite(fit.jump):
        # Both sides constant at one value: nothing varies, so nothing is tested (no p-value).
        nan = float("nan")
        row.update(jump=0.0, se=nan, z=nan, p_value=nan, ci_low=nan, ci_high=nan,
                   first_stage_f=nan, no_variation=True, interval="none")
        fit = replace(fit, jump=0.0, se=nan, z=nan, p_value=nan, ci_low=nan, ci_high=nan)
    elif np.isfinite(fit.jump):
        coarse = min(fit.distinct_left, fit.distinct_right) < MIN_DISTINCT   # as score.flags
        row.update(inference_fields(d, sel, spec.kernel, spec.degree, coarse, fit.se,
                                    levels=(fit.left, fit.right)))
    row["design"] = "unknown" if row.get("no_variation") else _design(fit)
    if spec.covariates and np.isfinite(fit.jump):
        covs = [v for v in spec.covariates if v != cand.running]
        bal = covariate_balance(stats, covs, c, h, spec.kernel, spec.degree, cand.right_closed)
        row.update(balance_p=bal.p_value, balance=bal.covariates, balance_worst=bal.worst(),
                   balance_method=bal.method)
    else:
        row.update(balance_p=float("nan"), balance=[], balance_worst=None, balance_method=None)
    row.update(design_checks(stats, cand, spec, fit, d, density_cache))
    return row


def _design(fit) -> str:
    if not np.isfinite(fit.jump):
        return "unknown"
    lo, hi = sorted((fit.left, fit.right))
    return "sharp" if lo <= 0.02 and hi >= 0.98 else "fuzzy"


# ---------------------------------------------------------------------------------- discovery
_CONFIRM_KEYS = ("jump", "se", "ci_low", "ci_high", "p_value", "z", "bandwidth", "n_left",
                 "n_right", "distinct_left", "distinct_right", "left", "right", "reason")


def discovery_step(stats: dict, rows: list, spec: ScanSpec, progress=None,
                   screen: bool = False) -> tuple[list, dict]:
    """Search every running variable × treatment for undeclared cutoffs (scanner.discover).

    With ``spec.confirm`` (default) the search runs on half 0 of the seeded split and every
    discovered cutoff is estimated and tested on half 1 (Card, Mas & Rothstein 2008); the row's
    ``p_value`` is the held-out p-value.  A break found next to a declared or round candidate of
    the same pair is reported on that candidate (``best_fit_cutoff``) instead of a new row.
    ``screen`` is for simulation studies (see scanner.discover.search_pair).
    Appends discovered rows to ``rows``; returns the p-values of scans that produced no row (each
    such scan is one test in the q-value family, see scanner.score) and a summary dict.
    """
    from .discover import bias_bound, near_candidate, search_pair
    split = spec.confirm and any((st.half >= 0).any() for st in stats.values())
    extra_p, pairs, n_grid, cache1 = [], [], 0, {}
    k = 0
    for r in spec.running:
        st = stats[r.column]
        find = st.restrict(half=0).pooled() if split else st.pooled()
        test = st.restrict(half=1).pooled() if split else st.pooled()
        for t in (r.treatments or spec.treatments):
            k += 1
            ps = search_pair(find, t, spec.alpha, spec.kernel, spec.min_rows, seed=spec.seed + k,
                             screen=screen)
            n_grid += ps.n_grid_points
            pairs.append(ps.to_dict())
            own = [x for x in rows if x["running"] == r.column and x["treatment"] == t
                   and x["origin"] in ("declared", "round")]
            new = 0
            for pk in ps.peaks:
                j = near_candidate(pk, [x["cutoff"] for x in own], [x["origin"] for x in own])
                disc = pk.to_dict()
                if j is not None:
                    x = own[j]
                    x.update(best_fit_cutoff=pk.location, location=pk.location,
                             location_ci_low=pk.ci_low, location_ci_high=pk.ci_high,
                             search_p=pk.search_p, discovery_half=disc)
                    continue
                cand = Candidate(r.column, t, pk.location, "discovered")
                row = evaluate(test, cand, spec, cache1)
                row.update(location=pk.location, location_ci_low=pk.ci_low,
                           location_ci_high=pk.ci_high, search_p=pk.search_p,
                           discovery_half=disc, split=bool(split),
                           confirm_half={key: row.get(key) for key in _CONFIRM_KEYS} if split else None)
                # A search seeks out curvature that looks like a jump: the discovered cutoff is
                # tested allowing for the worst-case smoothing bias (scanner.discover.bias_bound).
                bb = bias_bound(test, t, pk.location, row["bandwidth"], spec.kernel)
                row.update(conventional_p=row["p_value"], bias_bound=bb.bound,
                           curvature_bound=bb.curvature)
                pb = bb.p_value(row["jump"], row["se"])
                row["p_value"] = pb if np.isfinite(pb) else row["p_value"]
                if split:
                    row["confirm_half"]["p_value"] = row["p_value"]
                else:
                    # Same rows for search and estimate: only the search-adjusted p is honest.
                    row["p_value"] = max(row["p_value"], pk.search_p)
                rows.append(row)
                new += 1
            if new == 0:
                extra_p.append(ps.search_p)
            if progress:
                progress("discover", 1, None)
    return extra_p, {"n_grid_points": n_grid, "n_scans": len(pairs), "split": bool(split),
                     "split_by": (spec.unit or "row position") if split else None,
                     "seed": spec.seed, "pairs": pairs}
