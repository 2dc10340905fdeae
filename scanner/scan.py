"""Scan orchestration: read → bin (one pass) → candidates → estimates & diagnostics → score.

Everything after the binning pass works on BinnedStats only.
"""
from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import __version__
from .bins import BinnedStats
from .candidates import Candidate, declared, round_cutoffs
from .diagnostics import covariate_balance, heap_near, heap_tests, mccrary_test
from .engines import BinPlan, bin_table
from .errors import InputError
from .estimate import fit_jump, ik_bandwidth, side_data
from .estimate.bandwidth import ensure_support
from .io import open_table
from .rules import load_rules
from .score import MIN_DISTINCT, finalize
from .spec import ScanSpec, load_spec, parse_spec


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
    for r in spec.running:
        for t in r.treatments or ():
            if t not in spec.treatments:
                raise InputError(f"{spec.path or '<spec>'}: running variable '{r.column}' lists "
                                 f"treatment '{t}', which is not under [treatments] columns.")


def _keep_first(table, spec: ScanSpec, needed: list[str]):
    """One row per unit: the earliest by date (in memory; see docs)."""
    import pandas as pd
    import pyarrow as pa
    cols = list(dict.fromkeys(needed + [spec.unit, spec.date]))
    parts = [b.to_pandas() for b in table.batches(cols)]
    df = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=cols)
    before = len(df)
    dates = pd.to_datetime(df[spec.date], errors="coerce", format="mixed") if df[spec.date].dtype == object else df[spec.date]
    df = df.assign(_order=dates).sort_values(["_order"], kind="stable", na_position="last")
    df = df.drop_duplicates(spec.unit, keep="first").drop(columns="_order").sort_index()
    return open_table(pa.Table.from_pandas(df, preserve_index=False), table.name), before - len(df)


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
    notes = []
    engine = spec.engine
    if data is not None and type(data).__module__.startswith("pyspark"):
        engine = "spark"
        table = data
    else:
        if data is None:
            if not spec.source:
                raise InputError(f"{spec.path or '<spec>'}: no data: set data.source in the spec "
                                 "or pass data= to scan().")
            table = open_table(spec.resolve(spec.source))
        else:
            table = open_table(data)
        _check_columns(table, spec)
    rules = load_rules([spec.resolve(c) for c in spec.catalogues]) if spec.catalogues else []
    columns = tuple(dict.fromkeys(spec.treatments + spec.covariates + spec.outcomes))
    pairs = tuple((t, y) for t in spec.treatments for y in spec.outcomes if y != t)
    plan = BinPlan(running=tuple(r.column for r in spec.running), columns=columns,
                   treatments=spec.treatments, pairs=pairs,
                   bin_width={r.column: r.bin_width for r in spec.running if r.bin_width},
                   date=spec.date,
                   split_seed=spec.seed if spec.discover and spec.confirm else None,
                   split_unit=spec.unit)
    deduped = 0
    if spec.keep == "first" and engine == "local":
        table, deduped = _keep_first(table, spec, plan.needed)
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
        rows.append(evaluate(pooled[c.running], c, spec, density_cache))
        if progress:
            progress("estimate", 1, len(cands))
    extra_p, search = [], {"n_grid_points": 0, "pairs": []}
    if spec.discover:
        extra_p, search = discovery_step(binned.stats, rows, spec, progress)
    rows = finalize(rows, spec.alpha, extra_p)
    data_info = _data_info(binned, spec, deduped)
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
    bw_note = None
    if spec.bandwidth == "ik":
        choice = ik_bandwidth(stats, t, c, spec.kernel, cand.right_closed, data=d)
        h, method, bw_note = choice.h, "ik", choice.note
        if not np.isfinite(h):
            span = float(np.abs(d.u).max()) if d.u.size else float("nan")
            h, bw_note = span / 4, (choice.note or "") + "; fell back to a quarter of the range"
            method = "fallback"
    else:
        h, method = float(spec.bandwidth), "fixed"
    if method != "fixed" and d.u.size:
        h, widened = ensure_support(h, d, spec.degree, minimum=MIN_DISTINCT)
        bw_note = widened or bw_note
    fit = fit_jump(stats, t, c, h, spec.kernel, spec.degree, cand.right_closed, data=d)
    row = {
        "running": cand.running, "treatment": t, "cutoff": float(c), "origin": cand.origin,
        "rule_id": cand.rule_id, "eligible_side": cand.eligible_side,
        "rule_description": cand.rule.description if cand.rule else None,
        "jump": fit.jump, "se": fit.se, "ci_low": fit.ci_low, "ci_high": fit.ci_high,
        "p_value": fit.p_value, "z": fit.z, "first_stage_f": fit.z ** 2 if np.isfinite(fit.z) else float("nan"),
        "left": fit.left, "right": fit.right, "slope_left": fit.slope_left,
        "slope_right": fit.slope_right, "bandwidth": fit.bandwidth, "bandwidth_method": method,
        "bandwidth_note": bw_note, "kernel": spec.kernel, "degree": spec.degree,
        "n_left": fit.n_left, "n_right": fit.n_right, "distinct_left": fit.distinct_left,
        "distinct_right": fit.distinct_right, "reason": fit.reason,
        "right_closed": cand.right_closed,
    }
    row["design"] = _design(fit)
    key = (cand.running, c, cand.right_closed)
    if key not in density_cache:
        density_cache[key] = mccrary_test(stats, c, cand.right_closed)
    dens = density_cache[key]
    row.update(density_p=dens.p_value, density_theta=dens.theta, density_ratio=dens.ratio,
               density_method=dens.method, density_reason=dens.reason)
    if spec.covariates and np.isfinite(fit.jump):
        covs = [v for v in spec.covariates if v != cand.running]
        bal = covariate_balance(stats, covs, c, h, spec.kernel, spec.degree, cand.right_closed)
        row.update(balance_p=bal.p_value, balance=bal.covariates, balance_worst=bal.worst())
    else:
        row.update(balance_p=float("nan"), balance=[], balance_worst=None)
    hkey = ("heaps", cand.running)
    if hkey not in density_cache:
        density_cache[hkey] = heap_tests(stats)
    # A heap matters when it sits within half a bandwidth of the line (Barreca et al. 2016).
    heap = heap_near(density_cache[hkey], c, h / 2 if np.isfinite(h) else 0.0)
    row.update(heap_p=heap.p_value if heap else None, heap_ratio=heap.ratio if heap else None,
               heap_value=heap.value if heap else None)
    row["placebo_p"] = float("nan")
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
