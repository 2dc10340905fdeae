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
from .candidates import Candidate, declared, on_lattice, round_cutoffs
from .diagnostics import covariate_balance
from .diagnostics.design import design_checks
from .engines import BinPlan, bin_table
from .errors import CrowdedBin, InputError
from .estimate import fit_jump, side_data
from .estimate.inference import inference_fields
from .estimate.local import floor_variance
from .estimate.select import select_bandwidth
from .guards import (add_cleaning_info, checked_rules, cleaning_for, evaluate_contained,
                     explain_nan, keep_first, roles, text_columns, unit_repeats)
from . import quality
from .cleaning import cleaned
from .io import open_table
from .rules import load_rules
from .score import MIN_DISTINCT, finalize
from .spec import ScanSpec, load_spec, parse_spec
from .timeline import BEFORE_AFTER_FIELDS, POOLED_FIELDS, before_after, change_date, in_force_codes


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
    warnings: list = field(default_factory=list)     # {"kind", "column", "message"}, in order found

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
        lines += [f"warning [{w['kind']}]: {w['message']}" for w in self.warnings]
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
    for c in spec.value_map:
        table.require(c, "data.value_map")
    for r in spec.running:
        if r.unit_column:
            table.require(r.unit_column, "unit_column")
    for r in spec.running:
        for t in r.treatments or ():
            if t not in spec.treatments:
                raise InputError(f"{spec.path or '<spec>'}: running variable '{r.column}' lists "
                                 f"treatment '{t}', which is not under [treatments] columns.")


def open_for_scan(spec: ScanSpec, data=None):
    """Open the table a spec names (or ``data``), check its columns and wrap it for cleaning.

    Returns ``(table, engine, notes)``; a Spark DataFrame passes through to the Spark engine.
    The cleaned table carries ``quality``: the warnings found so far and the profile's findings
    (see :mod:`scanner.quality`), completed with exact counts after the pass.
    """
    notes = []
    engine = spec.engine
    if data is not None and type(data).__module__.startswith("pyspark"):
        return data, "spark", notes
    if spec.layout is not None and engine == "spark":
        from .events import open_spark_registry
        frame = open_spark_registry(spec, data)
        return frame, "spark", notes
    if spec.layout is not None:     # measurements and events: rows built by DuckDB
        from .events import open_registry
        table = open_registry(spec, data)
    elif data is None:
        if not spec.source:
            raise InputError(f"{spec.path or '<spec>'}: no data: set data.source in the spec "
                             "or pass data= to scan().")
        table = open_table(spec.resolve(spec.source), text_columns=text_columns(spec))
    else:
        table = open_table(data)
    _check_columns(table, spec)
    # Index rows of one person repeat by design with index = "each"; "first" has one per person.
    repeated = unit_repeats(table, spec) if spec.layout is None else []
    cleaning, sources = cleaning_for(table, spec)
    out = cleaned(table, spec.codes(), roles(spec), spec.date, spec.date_format, cleaning)
    out.quality = {"repeated": repeated, "sources": sources, "found": quality.plan(out, spec)}
    out.registry = getattr(table, "registry", None)
    return out, engine, notes


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
    screen = None
    if spec.layout is not None and spec.layout.screen is not None:
        from .events.screen import expand
        spec, screen = expand(spec, data)
    table, engine, notes = open_for_scan(spec, data)
    coded = getattr(table, "coded", None) or {}     # filled as batches are read; kept past keep-first
    rules = checked_rules([spec.resolve(c) for c in spec.catalogues]) if spec.catalogues else []
    columns = tuple(dict.fromkeys(spec.treatments + spec.covariates + spec.outcomes))
    pairs = tuple((t, y) for t in spec.treatments for y in spec.outcomes if y != t)
    # Declared cutoffs are known before the pass: they become bin edges (no bin straddles one).
    decl = {}
    for r in spec.running:
        decl[r.column] = declared(r, list(r.treatments or spec.treatments), rules)
    plan = BinPlan(running=tuple(r.column for r in spec.running), columns=columns,
                   treatments=spec.treatments, pairs=pairs,
                   bin_width={r.column: r.bin_width for r in spec.running if r.bin_width},
                   date=spec.date,
                   split_seed=(spec.seed if spec.discover and spec.confirm and engine != "spark"
                               else None),
                   split_unit=spec.unit, batch_rows=spec.batch_rows,
                   edges={col: tuple((c.cutoff, c.right_closed) for c in dec)
                          for col, (dec, _) in decl.items()},
                   round_edges=spec.round_numbers,
                   periods={col: _period_detail(dec, spec) for col, (dec, _) in decl.items()})
    deduped = no_unit = 0
    if spec.discover and spec.confirm and engine == "spark":
        notes.append("warning: the Spark engine has no row positions for the held-out half, so "
                     "discovered cutoffs are tested with the search-adjusted p-value on all rows.")
    if spec.keep == "first" and engine == "spark":
        raise InputError(f"{spec.path or '<spec>'}: keep = 'first' is not available with the Spark "
                         "engine; deduplicate the DataFrame first (e.g. a window over data.unit).")
    cleaning = getattr(table, "cleaning", None)
    checks = getattr(table, "quality", None)
    if spec.keep == "first" and engine == "local":
        table, deduped, no_unit = keep_first(table, spec, plan.needed)
    tick = (lambda m: progress("bin", m, getattr(table, "num_rows", None))) if progress else None
    registry = getattr(table, "registry", None)
    # Long-format registries: the bins are GROUP BY sums inside DuckDB (scanner.events.bins_sql).
    try:
        binned = registry.bin(table, plan) if registry is not None and engine == "local" else None
        if binned is None:
            binned = bin_table(table, plan, engine=engine, progress=tick)
    except CrowdedBin as exc:       # name the catalogue lines the crowded cutoffs come from
        raise exc.citing(decl.get(exc.running, ([], []))[0]) from None
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
        dec, why = decl[r.column]
        notes.extend(why)
        lattice = binned.stats[r.column].pooled()
        dec = [on_lattice(c, lattice) for c in dec]       # recorded values: see scanner.candidates
        cands.extend(dec)
        if spec.round_numbers:
            taken = {(c.treatment, c.cutoff) for c in dec}
            for c in round_cutoffs(lattice, spec.min_rows):
                for t in trs:
                    if (t, c) not in taken:
                        cands.append(on_lattice(Candidate(r.column, t, c, "round"), lattice))
    pooled = {r: st.pooled() for r, st in binned.stats.items()}
    screen_p = []
    if screen is not None:      # registry-wide screen: full evaluation only where stage 1 passes
        from .events.screen import first_stage
        cands, screen_p, screen["pairs"] = first_stage(cands, pooled, spec)
    rows, searches = evaluate_and_search(cands, pooled, binned.stats, spec, progress,
                                         workers=1 if engine == "spark" else None,
                                         search=spec.discover)
    for row in rows:
        explain_nan(row)
    extra_p, search = [], {"n_grid_points": 0, "pairs": []}
    if spec.discover:
        extra_p, search = discovery_step(binned.stats, rows, spec, progress, searches=searches)
        for row in rows:           # discovered rows: the bound on the half the jump came from
            if row["origin"] == "discovered" and "binning_error" not in row:
                st = binned.stats[row["running"]]
                st = st.restrict(half=1) if row.get("split") else st
                add_binning_error(row, st.pooled(), Candidate(row["running"], row["treatment"],
                                                              row["cutoff"], "discovered"), spec)
    rows = finalize(rows, spec.alpha, list(extra_p) + screen_p)
    # What the q-value family holds besides candidate rows (report.outputs.test_family).
    search["family_extra"] = {"searches": int(np.isfinite(np.asarray(extra_p, float)).sum()),
                              "screened_out": int(np.isfinite(np.asarray(screen_p, float)).sum())}
    if screen is not None:
        search["screen"] = screen
    data_info = _data_info(binned, spec, deduped, getattr(table, "blanked", {}), cleaning)
    registry = getattr(table, "registry", None)
    if registry is not None:
        from .events import layout_dropped
        data_info["dropped"] = layout_dropped(data_info["dropped"], spec, registry)
        data_info["index_rows"] = [{"column": k, "rows": v}
                                  for k, v in registry.index_rows().items()]
        periods = registry.period_problems()
        registry.close()
    add_cleaning_info(data_info, coded, spec, no_unit)
    warnings = collect_warnings(spec, checks, cleaning, binned.stats, rules, binned.rows_read)
    if registry is not None:
        warnings += quality.period_warnings(periods)
    return ScanResult(spec, rows, data_info, binned.stats, notes,
                      dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"), search,
                      warnings)


def collect_warnings(spec: ScanSpec, checks, cleaning, stats: dict, rules,
                     rows_read: int | None = None) -> list[dict]:
    """Every data-quality warning of the scan, in the order found (scanner.quality)."""
    from .candidates import rule_cutoff
    out = []
    if cleaning is not None and checks is not None:
        out += quality.parse_warnings(cleaning, spec, checks["sources"])
        late = quality.late_unit_findings(checks["found"], spec, stats, quality.PROFILE_ROWS,
                                          rows_read)
        out += quality.findings_to_warnings(checks["found"] + late, cleaning, stats, spec)
        out += checks["repeated"]
    out += quality.rule_warnings(spec, rules, stats, rule_cutoff)
    out += quality.no_variation(spec, stats)
    return out


def _evaluate_group(cands, pooled: dict, stats: dict, spec: ScanSpec, progress=None,
                    total: int | None = None, search=()) -> list:
    """Rows of a list of candidates, in order (one density cache for the group); with
    ``search`` (running variables) also their discovery searches: (rows, searches)."""
    if search:
        return (_evaluate_group(cands, pooled, stats, spec, progress, total),
                pair_searches(stats, spec, set(search)))
    from functools import partial
    from .together import prepare
    rows, density_cache = [], {}
    ready = prepare(cands, pooled, spec)
    for i, c in enumerate(cands):
        row = evaluate_contained(partial(evaluate, prepared=ready.get(i)), pooled[c.running], c,
                                 spec, density_cache)
        force = in_force_codes(stats[c.running], c.rule)
        if force is not None:
            # A dated rule: the headline comes from the periods it was in force; pooled beside.
            st = stats[c.running].restrict(period=force[0]).pooled()
            key = ("in force", c.running, tuple(force[0]))
            alone = evaluate_contained(evaluate, st, c, spec, density_cache.setdefault(key, {}))
            alone.update({f"{k}_pooled": row.get(k) for k in POOLED_FIELDS}, in_force=force[1])
            row = alone
        row.update(c.lattice_fields())
        add_binning_error(row, pooled[c.running], c, spec)
        # Declared rules with an effective date: jumps before/after it from the period keys.
        row.update(dict.fromkeys(BEFORE_AFTER_FIELDS))
        if c.rule is not None and np.isfinite(row.get("bandwidth", np.nan)):
            row.update(before_after(stats[c.running], c, row["bandwidth"], spec.kernel,
                                    spec.degree))
        rows.append(row)
        if progress:
            progress("estimate", 1, total)
    return rows


MIN_PARALLEL = 40    # fewer candidates than this are not worth a second process (measured: ~0.1 s fork)


def workers_default() -> int:
    """Processes for the candidate loop: ``CUTSCAN_WORKERS`` if set, else up to 2 (the cores)."""
    import os
    env = os.environ.get("CUTSCAN_WORKERS")
    if env and env.strip().isdigit():
        return max(1, int(env))
    return max(1, min(2, os.cpu_count() or 1))


def split_by_running(cands, k: int, extra: dict | None = None) -> list[list[int]]:
    """Candidate positions in ``k`` groups of whole running variables, balanced by count
    (plus ``extra[running]``, the weight of other work on a running variable)."""
    by = {}
    for i, c in enumerate(cands):
        by.setdefault(c.running, []).append(i)
    extra = extra or {}
    groups = [[] for _ in range(k)]
    load = [0] * k
    for r, idx in sorted(by.items(), key=lambda kv: len(kv[1]) + extra.get(kv[0], 0), reverse=True):
        j = min(range(k), key=lambda g: (load[g], len(groups[g])))
        groups[j].extend(idx)
        load[j] += len(idx) + extra.get(r, 0)
    return [sorted(g) for g in groups if g]


SEARCH_WEIGHT = 12   # one discovery search costs about as much as this many candidates (profiled)


def evaluate_all(cands, pooled: dict, stats: dict, spec: ScanSpec, progress=None,
                 workers: int | None = None) -> list:
    """Evaluate every candidate; running variables are shared among ``workers`` processes.

    Every candidate's row depends only on its own running variable's bins, so the rows are the
    same whatever the split (tested).  The other processes are forked (they read the bins without
    copying them) and send their rows back through a pipe; with one worker, too few candidates
    or no ``fork`` on the platform, everything runs here.
    """
    return evaluate_and_search(cands, pooled, stats, spec, progress, workers)[0]


def evaluate_and_search(cands, pooled: dict, stats: dict, spec: ScanSpec, progress=None,
                        workers: int | None = None, search: bool = False):
    """:func:`evaluate_all`, and with ``search`` the discovery searches of every running
    variable × treatment (:func:`pair_searches`) run in the same processes, each beside the
    candidates of its running variable.  Returns (rows, searches or None)."""
    with one_blas_thread():
        return _evaluate_and_search(cands, pooled, stats, spec, progress, workers, search)


def one_blas_thread():
    """A context in which the linear algebra library uses one thread.

    The candidate loop already runs in one process per core; the BLAS library's own threads on
    top of that (two per process on two cores) spin-wait for each other, which measured 5× the
    wall time and 10× the CPU time of one thread for the discovery search's Cholesky factors on
    this shared machine.  One thread also makes the factors, and so the simulated critical
    values, independent of the number of cores (they differ in the last bits otherwise).
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:                     # a declared dependency; without it, as before
        import contextlib
        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def _evaluate_and_search(cands, pooled, stats, spec, progress, workers, search):
    import multiprocessing as mp
    workers = workers_default() if workers is None else workers
    runs = [r.column for r in spec.running] if search else []
    extra = {r.column: SEARCH_WEIGHT * len(r.treatments or spec.treatments) for r in spec.running
             } if search else {}
    weight = len(cands) + sum(extra.values())
    groups = split_by_running(cands, workers, extra) if weight >= MIN_PARALLEL else [list(range(len(cands)))]
    if len(groups) < 2 or "fork" not in mp.get_all_start_methods():
        rows = _evaluate_group(cands, pooled, stats, spec, progress, len(cands))
        return rows, (pair_searches(stats, spec) if search else None)
    # Running variables without candidates search in the last group.
    owner = {cands[i].running: j for j, g in enumerate(groups) for i in g}
    mine = [[r for r in runs if owner.get(r, len(groups) - 1) == j] for j in range(len(groups))]
    ctx = mp.get_context("fork")
    pipes, procs = [], []
    for g, srch in zip(groups[1:], mine[1:]):
        recv, send = ctx.Pipe(duplex=False)
        proc = ctx.Process(target=_child, args=(send, [cands[i] for i in g], pooled, stats, spec,
                                                srch), daemon=True)
        proc.start()
        send.close()
        pipes.append(recv)
        procs.append(proc)
    rows: list = [None] * len(cands)
    got0 = _evaluate_group([cands[i] for i in groups[0]], pooled, stats, spec, progress,
                           len(cands), mine[0])
    found = {}
    if mine[0]:
        got0, s0 = got0
        found.update(s0)
    for i, row in zip(groups[0], got0):
        rows[i] = row
    for g, srch, recv, proc in zip(groups[1:], mine[1:], pipes, procs):
        ok, got = recv.recv()
        proc.join()
        if not ok:
            raise got
        if srch:
            got, s1 = got
            found.update(s1)
        for i, row in zip(g, got):
            rows[i] = row
        if progress:
            progress("estimate", len(g), len(cands))
    return rows, (found if search else None)


def _child(send, cands, pooled, stats, spec, search=()) -> None:
    try:
        send.send((True, _evaluate_group(cands, pooled, stats, spec, search=search)))
    except BaseException as exc:  # noqa: BLE001 - handed to the parent, which raises it
        send.send((False, exc))
    finally:
        send.close()


def _period_detail(dec: list, spec: ScanSpec) -> str:
    """Period keys a running variable's bins need: quarters where a declared rule has an
    effective date (before/after jumps), years otherwise (the report's timeline of the jump).
    Each period multiplies the bins held during the pass, so none is kept that is not used."""
    if any(change_date(c.rule) is not None for c in dec):
        return "quarter"
    return "year"


def add_binning_error(row: dict, stats: BinnedStats, cand: Candidate, spec: ScanSpec) -> None:
    """Bound on how far the jump from bins can be from the row-level jump (scanner.binerror);
    flag ``binning`` where it exceeds a quarter of the SE (our rule)."""
    from .binerror import NEGLIGIBLE, binning_error
    h = row.get("bandwidth", np.nan)
    if stats.kind == "exact" or not np.isfinite(row.get("jump", np.nan)) or not np.isfinite(h):
        bound, why = (0.0 if stats.kind == "exact" else float("nan")), None
    else:
        bound, why = binning_error(stats, cand.treatment, cand.cutoff, row.get("bandwidth_left", h),
                                   row.get("bandwidth_right", h), spec.kernel, spec.degree,
                                   cand.right_closed)
    se = row.get("se", np.nan)
    row["binning_error"] = bound
    row["binning_error_se"] = bound / se if np.isfinite(se) and se > 0 else float("nan")
    row["binning_note"] = why
    if not (row["binning_error_se"] <= NEGLIGIBLE) and np.isfinite(row.get("jump", np.nan)) \
            and stats.kind != "exact" and not (np.isnan(bound) and why is None):
        row.setdefault("extra_flags", []).append("binning")


def _data_info(binned, spec: ScanSpec, deduped: int, blanked=None, cleaning=None) -> dict:
    blanked = blanked or {}
    dropped = []
    if deduped:
        dropped.append({"column": spec.unit, "treatment": None,
                        "reason": "repeat rows of a unit (keep = first)", "rows": deduped})
    for r in spec.running:
        col = r.column
        # Values a cleaning step set missing are counted under their own reason, not twice.
        own = []
        if blanked.get(col):
            own.append(("not the unit's first value (keep = first)", blanked[col]))
        if cleaning is not None and spec.keep != "first":
            hits = sum(cleaning.sentinel_hits.get(col, {}).values())
            if hits:
                own.append(("missing-value code outside the plausible range", hits))
            if cleaning.out_of_range.get(col):
                own.append(("value fits only another unit", cleaning.out_of_range[col]))
        plain = binned.missing[col] - sum(k for _, k in own)
        if plain:
            dropped.append({"column": col, "treatment": None, "reason": "running variable missing",
                            "rows": plain})
        for why, k in own:
            dropped.append({"column": col, "treatment": None, "reason": why, "rows": k})
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


def evaluate(stats: BinnedStats, cand: Candidate, spec: ScanSpec, density_cache: dict,
             prepared=None) -> dict:
    """All estimates and diagnostics for one candidate, as a flat dict.

    ``prepared``: (bandwidth choice, covariate balance or None) computed for all candidates
    of the running variable at once (:func:`scanner.together.prepare`), on these ``stats``.
    """
    t, c = cand.treatment, cand.cutoff
    d = side_data(stats, t, c, cand.right_closed)
    if prepared is not None:
        sel, bal = prepared
    else:
        sel = select_bandwidth(d, spec.bandwidth, spec.kernel, spec.degree, spec.per_side,
                               MIN_DISTINCT)
        bal = None
    h = (sel.h_left + sel.h_right) / 2   # diagnostics below use one window
    # A side with no variation in the window gets a variance that cannot vanish (local.py).
    raw = d
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
        if bal is None:
            bal = covariate_balance(stats, covs, c, h, spec.kernel, spec.degree, cand.right_closed)
        row.update(balance_p=bal.p_value, balance=bal.covariates, balance_worst=bal.worst(),
                   balance_method=bal.method)
    else:
        row.update(balance_p=float("nan"), balance=[], balance_worst=None, balance_method=None)
    # Binary-ness from the raw data: the floored d of a 0/1 column no longer looks 0/1.
    row.update(design_checks(stats, cand, spec, fit, d, density_cache, binary=variation.binary,
                             raw=raw))
    return row


def _design(fit) -> str:
    if not np.isfinite(fit.jump):
        return "unknown"
    lo, hi = sorted((fit.left, fit.right))
    return "sharp" if lo <= 0.02 and hi >= 0.98 else "fuzzy"


from .search_step import discovery_step, pair_searches  # noqa: E402  (they call evaluate)
