"""``cutscan check``: did one rule change care, from when, and at which value?

For one catalogue rule (and every rule linked to it by ``group`` / ``replaces``), on the
running variable whose ``quantity`` matches:

1. the pooled jump at the rule's cutoff (the same evaluation ``scan`` makes), whose bandwidth is
   then held fixed for everything below;
2. the jump at each of the group's cutoffs in every calendar period (quarter or year, see
   :func:`scanner.timeline.choose_granularity`), and the best one-break fit near the cutoffs in
   that period (:func:`scanner.locate.locate`: least squares, Hansen 2000 — the estimator the
   discovery search uses), so a moved line can be followed;
3. before versus after each effective date: the difference-in-discontinuities;
4. the location estimate on the pooled data.

One binning pass: periods are the quarter keys of the BinnedStats.
"""
from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field, replace

import numpy as np

from .candidates import Candidate, on_lattice, rule_cutoff
from .engines import BinPlan, bin_table
from .errors import InputError, SpecError, closest
from .locate import Location, locate
from .rules import Rule, group_of, load_rules
from .spec import ScanSpec, load_spec
from .timeline import (PeriodJump, change_date, choose_granularity, diff_in_disc,
                       period_jumps, periods, period_label)


@dataclass
class CheckResult:
    """Everything ``cutscan check`` found for one rule and one treatment."""

    rule: Rule
    running: str
    treatment: str
    group: list                     # rules of the group, oldest first
    cutoffs: dict                   # rule id -> cutoff on the column's scale
    pooled: dict                    # the scan's evaluation at the rule's cutoff
    bandwidth: float
    granularity: str
    periods: dict                   # rule id -> list[PeriodJump]
    moving: list                    # per period: (label, Location)
    changes: list                   # list[(rule id, DiscDiff)]
    location: Location
    notes: list = field(default_factory=list)


def _find_rule(rules: list[Rule], rule_id: str, where: str) -> Rule:
    for r in rules:
        if r.id == rule_id:
            return r
    ids = [r.id for r in rules]
    shown = ", ".join(ids[:15]) + (" ..." if len(ids) > 15 else "")
    raise InputError(f"{where}: rule '{rule_id}' is not in the spec's catalogues"
                     f"{closest(rule_id, ids)}. Rules available: {shown or 'none'}.")


def _running_for(spec: ScanSpec, rule: Rule):
    for r in spec.running:
        if r.quantity == rule.quantity:
            return r
    raise InputError(f"{spec.path or '<spec>'}: rule '{rule.id}' concerns quantity "
                     f"'{rule.quantity}', but no [[running]] entry has quantity = "
                     f"\"{rule.quantity}\". Add quantity = \"{rule.quantity}\" to the running "
                     "variable that records it.")


def in_force(group: list[Rule], day: dt.date) -> Rule | None:
    """The group's rule in force on ``day`` (None when none is)."""
    live = [r for r in group if (r.effective_from is None or r.effective_from <= day)
            and (r.effective_to is None or day <= r.effective_to)]
    return live[-1] if live else None


def check(spec_or_path, rule_id: str, data=None, treatment: str | None = None,
          granularity: str = "auto") -> list[CheckResult]:
    """Run the one-rule check; one CheckResult per treatment the rule concerns.

    Parameters
    ----------
    spec_or_path : ScanSpec or path of a scan spec with ``data.date`` and rule catalogues.
    rule_id : id of the rule to check.
    data : optional table (pandas DataFrame, pyarrow Table); otherwise ``data.source``.
    treatment : only this treatment (default: every treatment the rule concerns).
    granularity : 'quarter', 'year' or 'auto' (chosen from the rows near the line).
    """
    from .guards import keep_first
    from .scan import evaluate, open_for_scan
    spec = spec_or_path if isinstance(spec_or_path, ScanSpec) else load_spec(spec_or_path)
    where = spec.path or "<spec>"
    if not spec.catalogues:
        raise SpecError(f"{where}: no rule catalogues; add [rules] catalogues = [\"...\"].")
    rules = load_rules([spec.resolve(c) for c in spec.catalogues])
    rule = _find_rule(rules, rule_id, where)
    if not spec.date:
        raise SpecError(f"{where}: cutscan check needs dates: set data.date to the column "
                        "holding the visit or decision date.")
    if granularity not in ("auto", "quarter", "year"):
        raise InputError(f"--period {granularity}: choose auto, quarter or year.")
    running = _running_for(spec, rule)
    allowed = list(running.treatments or spec.treatments)
    trs = [t for t in allowed if not rule.treatments or t in rule.treatments]
    if treatment is not None:
        if treatment not in trs:
            raise InputError(f"--treatment {treatment}: rule '{rule.id}' on '{running.column}' "
                             f"concerns {', '.join(trs) or 'no listed treatment'}{closest(treatment, trs)}.")
        trs = [treatment]
    if not trs:
        raise InputError(f"{where}: rule '{rule.id}' lists treatments {', '.join(rule.treatments)}, "
                         f"none of which is a treatment of '{running.column}' in the spec.")
    group = group_of(rule, rules)
    table, _, _ = open_for_scan(spec, data)
    spec = replace(spec, running=(running,), outcomes=())
    plan = BinPlan(running=(running.column,), columns=tuple(dict.fromkeys(trs + list(spec.covariates))),
                   treatments=tuple(trs),
                   bin_width={running.column: running.bin_width} if running.bin_width else {},
                   date=spec.date)
    if spec.keep == "first":
        table, _, _ = keep_first(table, spec, plan.needed)
    stats = bin_table(table, plan, engine=spec.engine).stats[running.column]
    if not (stats.period >= 0).any():
        raise InputError(f"{table.name}: date column '{spec.date}' holds no usable dates.")
    # Rules placed on the recorded values as the scan places them (scanner.candidates).
    placed = {r.id: on_lattice(Candidate(running.column, trs[0], rule_cutoff(r, running),
                                         "declared", r, r.right_closed), stats) for r in group}
    cutoffs = {rid: c.cutoff for rid, c in placed.items()}
    decl = {rid: c.cutoff if c.cutoff_declared is None else c.cutoff_declared
            for rid, c in placed.items()}
    out = []
    for t in trs:
        cand = replace(placed[rule.id], treatment=t)
        row = evaluate(stats.pooled(), cand, spec, {})
        row.update(cand.lattice_fields())
        h = row["bandwidth"]
        gran = (choose_granularity(stats, t, cand.cutoff, h, rule.right_closed)
                if granularity == "auto" else granularity)
        per = {r.id: period_jumps(stats, t, cutoffs[r.id], h, gran, spec.kernel, spec.degree,
                                  r.right_closed) for r in group}
        values = sorted(set(cutoffs.values()))
        moving = []
        for start, codes in periods(stats, gran):
            loc = locate(stats.restrict(period=codes), t, values, h, kernel=spec.kernel,
                         degree=spec.degree, right_closed=rule.right_closed)
            moving.append((period_label(start, gran), loc))
        changes = []
        for r in group:
            day = change_date(r)
            if day is not None:
                changes.append((r.id, diff_in_disc(stats, t, cutoffs[r.id], h, day, spec.kernel,
                                                   spec.degree, r.right_closed)))
        loc = locate(stats, t, values, h, kernel=spec.kernel, degree=spec.degree,
                     right_closed=rule.right_closed)
        notes = [f"rule '{r.id}': {r.cutoff:g} {r.unit} is {decl[r.id]:.6g} {running.unit}"
                 + (f", applied at the recorded value {cutoffs[r.id]:g}"
                    if cutoffs[r.id] != decl[r.id] else "")
                 for r in group if cutoffs[r.id] != r.cutoff]
        out.append(CheckResult(rule, running.column, t, group, cutoffs, row, h, gran, per,
                               moving, changes, loc, notes))
    return out


CLEAR_T = 3.0     # a period's largest jump is shown only when |t| ≥ 3 (our choice; a search inflates t)


def _hide(n, min_cell):
    return None if n is not None and 0 < n < min_cell else n


def to_dict(res: CheckResult, min_cell: int = 11) -> dict:
    """JSON-safe summary with small cells suppressed (counts 1..min_cell−1 and their estimates)."""
    from .report.outputs import clean

    def period_row(p: PeriodJump) -> dict:
        d = p.to_dict()
        if _hide(p.n_left, min_cell) is None or _hide(p.n_right, min_cell) is None:
            for k in ("jump", "se", "ci_low", "ci_high"):
                d[k] = None
            d["reason"] = d["reason"] or f"fewer than {min_cell} rows on a side: suppressed"
        d["n_left"], d["n_right"] = _hide(p.n_left, min_cell), _hide(p.n_right, min_cell)
        return d

    pooled = {k: res.pooled.get(k) for k in ("cutoff", "jump", "se", "ci_low", "ci_high",
                                             "p_value", "bandwidth", "n_left", "n_right",
                                             "density_p", "balance_p", "reason",
                                             "cutoff_declared", "split_low", "split_high")}
    for k in ("n_left", "n_right"):
        pooled[k] = _hide(pooled[k], min_cell)
    changes = []
    for rid, d in res.changes:
        dd = d.to_dict()
        dd["rule_id"] = rid
        changes.append(dd)
    return clean({
        "rule": res.rule.to_dict(), "running": res.running, "treatment": res.treatment,
        "group": [r.id for r in res.group], "cutoffs": res.cutoffs, "bandwidth": res.bandwidth,
        "granularity": res.granularity, "pooled": pooled,
        "periods": {rid: [period_row(p) for p in ps] for rid, ps in res.periods.items()},
        "moving": [{"period": lab, **loc.to_dict(), "clear": bool(abs(loc.t) >= CLEAR_T)}
                   for lab, loc in res.moving],
        "changes": changes, "location": res.location.to_dict(), "notes": res.notes,
        "min_cell": min_cell,
    })


# ---------------------------------------------------------------------------- terminal and figure
def _fmt(v, spec="+.3f"):
    return "—" if v is None or not np.isfinite(v) else format(v, spec)


def render(res: CheckResult, min_cell: int = 11):
    """Rich renderables for the terminal: the period table and the summary lines."""
    from rich.table import Table
    from rich.text import Text
    d = to_dict(res, min_cell)
    ids = d["group"]
    title = (f"{res.rule.id}: {res.running} × {res.treatment}, jump in uptake by "
             f"{res.granularity} (bandwidth {res.bandwidth:.3g})")
    tab = Table(title=title, title_justify="left", header_style="bold")
    tab.add_column("period")
    tab.add_column(f"rows near {res.cutoffs[ids[0]]:g}", justify="right")
    for rid in ids:
        tab.add_column(f"jump at {res.cutoffs[rid]:g} [95% CI]", justify="right")
    tab.add_column("largest jump at", justify="right")
    tab.add_column("rule in force")
    for i, (label, loc) in enumerate(res.moving):
        first = d["periods"][ids[0]][i]
        n = [first["n_left"], first["n_right"]]
        rows = "<%d" % min_cell if None in n else f"{n[0] + n[1]:,}"
        cells = []
        for rid in ids:
            p = d["periods"][rid][i]
            cells.append("—" if p["jump"] is None else
                         f"{p['jump']:+.3f} [{p['ci_low']:+.2f}, {p['ci_high']:+.2f}]")
        live = in_force(res.group, dt.date.fromisoformat(first["start"]))
        where = _fmt(loc.cutoff, "g") if d["moving"][i]["clear"] else "no clear jump"
        tab.add_row(label, rows, *cells, where, live.id if live else "—")
    lines = []
    pooled = d["pooled"]
    lines.append(f"All periods: jump {_fmt(pooled['jump'])} (SE {_fmt(pooled['se'], '.3f')}) at "
                 f"{res.cutoffs[res.rule.id]:g}.")
    for c in d["changes"]:
        if c["did"] is None:
            lines.append(f"Around {c['change']} ({c['rule_id']}): not estimable — {c['reason']}.")
            continue
        gap = f"; {c['left_out']} left out (it mixes both regimes)" if c["left_out"] else ""
        lines.append(f"Around {c['change']} ({c['rule_id']}, cutoff {res.cutoffs[c['rule_id']]:g}): "
                     f"jump before {c['jump_before']:+.3f} (SE {c['se_before']:.3f}), after "
                     f"{c['jump_after']:+.3f} (SE {c['se_after']:.3f}); difference-in-"
                     f"discontinuities {c['did']:+.3f} (SE {c['did_se']:.3f}, 95% CI "
                     f"{c['did_ci_low']:+.3f} to {c['did_ci_high']:+.3f}){gap}.")
    if not d["changes"]:
        lines.append(f"Rule '{res.rule.id}' has no effective date, so there is no before/after "
                     "comparison; the period table shows whether the jump is stable.")
    loc = res.location
    if np.isfinite(loc.cutoff):
        where = (f"({loc.ci_low:g}, {loc.ci_high:g}]" if loc.ci_low_open
                 else f"[{loc.ci_low:g}, {loc.ci_high:g}]")
        lines.append(f"Best one-break fit at {loc.cutoff:g}: jump {loc.jump:+.3f} (|t| "
                     f"{abs(loc.t):.1f}); 95% location set {where}; declared "
                     f"{', '.join(f'{v:g}' for v in loc.declared)}; {loc.grid_points} splits "
                     f"from {loc.grid_low:g} to {loc.grid_high:g} ({loc.method}). A search, not "
                     "a test; the scan's discovery step does the search-adjusted version.")
    lines.extend(res.notes)
    return tab, Text("\n".join(lines))


# Okabe & Ito (2008) colour-blind-safe colours; each series also has its own marker and line
# style so the figure still reads in greyscale.
SERIES = [("#0072B2", "o", "-"), ("#D55E00", "s", "--"), ("#009E73", "^", ":"),
          ("#CC79A7", "D", "-.")]


def write_figure(res: CheckResult, path, min_cell: int = 11) -> None:
    """Timeline PNG: jump per period at each cutoff (top) and where uptake jumps most (bottom)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    d = to_dict(res, min_cell)
    fig, (ax, bx) = plt.subplots(2, 1, figsize=(8.5, 6.2), sharex=True,
                                 gridspec_kw={"height_ratios": [3, 2]})
    for k, rid in enumerate(d["group"]):
        colour, marker, style = SERIES[k % len(SERIES)]
        ps = [p for p in d["periods"][rid] if p["jump"] is not None]
        if not ps:
            continue
        x = [dt.date.fromisoformat(p["start"]) for p in ps]
        y = np.array([p["jump"] for p in ps])
        lo = y - np.array([p["ci_low"] for p in ps])
        hi = np.array([p["ci_high"] for p in ps]) - y
        ax.errorbar(x, y, yerr=[lo, hi], color=colour, marker=marker, linestyle=style,
                    markersize=5, capsize=2, linewidth=1.3,
                    label=f"at {res.cutoffs[rid]:g} ({rid})")
    ax.axhline(0, color="0.35", linewidth=0.8)
    for day in sorted({c["change"] for c in d["changes"]}):
        for a in (ax, bx):
            a.axvline(dt.date.fromisoformat(day), color="0.2", linestyle=(0, (1, 2)), linewidth=1)
        ax.annotate(f"change {day}", (dt.date.fromisoformat(day), 1),
                    xycoords=("data", "axes fraction"), xytext=(3, -3), textcoords="offset points",
                    va="top", fontsize=7, color="0.2")
    ax.set_ylabel("jump in uptake\n(95% CI)")
    ax.legend(frameon=False, fontsize=8, loc="lower right")
    xs = [dt.date.fromisoformat(p["start"]) for p in d["periods"][d["group"][0]]]
    ys = [m["cutoff"] if m["clear"] else np.nan for m in d["moving"]]
    bx.plot(xs, ys, color="black", marker="o", markerfacecolor="white", linestyle="-",
            linewidth=1, label=f"largest jump (|t| ≥ {CLEAR_T:g})")
    for k, rid in enumerate(d["group"]):
        bx.axhline(res.cutoffs[rid], color=SERIES[k % len(SERIES)][0],
                   linestyle=SERIES[k % len(SERIES)][2], linewidth=1)
    bx.set_ylabel(f"{res.running}\nwhere uptake jumps")
    bx.set_xlabel(f"period start ({res.granularity})")
    bx.legend(frameon=False, fontsize=8, loc="best")
    for a in (ax, bx):
        a.spines[["top", "right"]].set_visible(False)
        a.grid(axis="y", color="0.9", linewidth=0.6)
    fig.suptitle(f"{res.rule.id}: {res.treatment} by period", x=0.02, ha="left", fontsize=11)
    fig.text(0.02, 0.005, f"Bins with fewer than {min_cell} rows on a side are not shown. "
             "Candidates are hypotheses about how care was assigned, not proof.", fontsize=6.5,
             color="0.3")
    fig.tight_layout(rect=(0, 0.02, 1, 0.97))
    fig.savefig(path, dpi=130)
    plt.close(fig)
