"""Data-quality findings: the ``warnings`` of results.json, the terminal and the report.

A warning is ``{"kind", "column", "message"}``; the message names the column, what was seen (with
counts), what cutscan did and the spec key that fixes or silences it.  Kinds (never renamed):

* ``decimal_comma`` — numbers stored as text with a decimal comma were read as decimals;
* ``value_map`` — codes of a flag or category were turned into numbers (spec map or Stata labels);
* ``sentinel_values`` — a spike at a code such as −99 or 999 outside the bulk of a column;
  treated as missing when it is also outside the quantity's plausible range, otherwise left in
  and named with the key that declares it missing;
* ``mixed_units`` — a running variable holds values that fit only another unit of its quantity
  (HbA1c in % and mmol/mol): those rows are set missing, or converted row by row when
  ``unit_column`` names each row's unit;
* ``wrong_unit`` — most values lie outside the plausible range of the declared unit;
* ``cutoff_off_lattice`` — a declared (or converted) cutoff falls between recorded values;
* ``rule_outside_data`` — a rule's cutoff lies outside the values of its running variable;
* ``repeated_units`` — units (persons) with several rows counted several times;
* ``no_variation`` — a treatment or covariate with one value only.

Detection reads a profile of the first ``PROFILE_ROWS`` rows of the scan's own pass (no extra
read); the counts in messages are exact, taken in that pass (``scanner.cleaning.Cleaning``) or from
the binned sums.
"""
from __future__ import annotations

import numpy as np

from .engines.plan import weighted_quantile
from .units import PLAUSIBLE, plausible_range, units_for

KINDS = ("mixed_units", "sentinel_values", "decimal_comma", "cutoff_off_lattice",
         "rule_outside_data", "repeated_units", "no_variation", "value_map", "wrong_unit",
         "period_dates")
SENTINELS = (-1.0, -9.0, -99.0, -999.0, -9999.0, 8.0, 9.0, 88.0, 99.0, 888.0, 999.0, 8888.0,
             9999.0, 99999.0)
PROFILE_ROWS = 200_000
MIN_SPIKE = 5            # rows at a code before it counts as a spike
SPIKE_RATIO = 3          # ... and at least this many times any value between it and the bulk
GAP_STEPS = 3            # ... and apart from every other value by 3 recording steps
GAP_SHARE = 0.05         # ... and by 5 % of the bulk's range (a code is not the next value)
MIXED_SHARE = 0.005      # share of rows fitting only another unit that makes a column "mixed"
MIXED_MIN = 20


def warning(kind: str, column, message: str, count=None) -> dict:
    """One warning; ``count`` (rows or cells concerned, when one number says it) is an extra
    field beside the contract's three."""
    assert kind in KINDS, kind
    return {"kind": kind, "column": column, "message": message,
            "count": None if count is None else int(count)}


def _n(k) -> str:
    return f"{int(k):,} row" + ("" if int(k) == 1 else "s")


def _g(v: float) -> str:
    return f"{v:.6g}" if float(v) == round(float(v), 4) else f"{v:.4g}"


# ---------------------------------------------------------------------- profile and plan
def sentinel_spikes(v: np.ndarray) -> list[float]:
    """Codes from SENTINELS that form a spike outside the bulk of ``v``.

    Outside the bulk: beyond the 0.1 % / 99.9 % quantiles of the other values, and apart from the
    nearest other value by GAP_STEPS recording steps (median spacing of the support) and
    GAP_SHARE of the bulk's range, so 99 on a 0–99 scale is the scale's last value, not a code.
    A spike: at least MIN_SPIKE rows, and SPIKE_RATIO times the rows at any other value lying
    between it and the bulk (so a smooth tail such as 6, 7, 8 admissions is not a code, while
    999 after a gap is).  Common practice, tuned on invented extracts.
    """
    if v.size < 20:
        return []
    if not any(np.count_nonzero(v == s) >= MIN_SPIKE for s in SENTINELS):
        return []                                   # the common case, without sorting
    vals, counts = np.unique(v, return_counts=True)
    is_code = np.isin(vals, SENTINELS)
    bulk = np.repeat(vals[~is_code], counts[~is_code])
    if bulk.size < 20:
        return []
    lo, hi = np.quantile(bulk, [0.001, 0.999])
    support = vals[~is_code]
    spacing = float(np.median(np.diff(support))) if support.size > 1 else 0.0
    gap_needed = max(GAP_STEPS * spacing, GAP_SHARE * (hi - lo))
    found = []
    for s, k in zip(vals[is_code], counts[is_code]):
        if k < MIN_SPIKE or lo <= s <= hi:
            continue
        if np.min(np.abs(support - s)) < gap_needed:     # the next value of a tail, not a code
            continue
        between = (~is_code) & ((vals > hi) & (vals < s) if s > hi else (vals < lo) & (vals > s))
        if k >= SPIKE_RATIO * (counts[between].max() if between.any() else 0):
            found.append(float(s))
    return found


def plan(table, spec) -> list[dict]:
    """Arrange for the profile: the first PROFILE_ROWS rows of the scan's own pass.

    ``table`` is the output of :func:`scanner.cleaning.cleaned`.  When the pass has read that many rows
    (or all of them) the planner decides what the pass does about codes and units — it sets
    ``sentinels``, ``watch`` and ``keep_range`` of the table's cleaning — before any row leaves
    the cleaning step, so every row is treated alike.  Returns the list of findings, filled in
    during the pass; :func:`findings_to_warnings` turns them into warnings with exact counts.
    """
    cl = table.cleaning
    running = {r.column: r for r in spec.running}
    cols = list(dict.fromkeys(list(running) + [c for c in spec.covariates if c not in running]))
    found: list[dict] = []

    def planner(profile: dict) -> None:
        found.extend(plan_values({c: v[np.isfinite(v)] for c, v in profile.items()}, spec, cl))

    cl.planner, cl.profile_columns, cl.profile_rows = planner, tuple(cols), PROFILE_ROWS
    for c, uc in cl.units.items():
        found.append({"kind": "mixed_units", "column": c, "unit_column": uc.column})
    return found


def plan_values(prof: dict, spec, cl) -> list[dict]:
    """Findings from the profiled (finite) values of running variables and covariates."""
    running = {r.column: r for r in spec.running}
    found = []
    for c, v in prof.items():
        r = running.get(c)
        for s in sentinel_spikes(v):
            outside = _implausible(s, r)
            if outside:
                cl.sentinels.setdefault(c, set()).add(s)
            else:
                cl.watch.setdefault(c, set()).add(s)
            found.append({"kind": "sentinel_values", "column": c, "value": s, "dropped": outside,
                          "range": outside})
        if r is None or not r.quantity or r.quantity not in PLAUSIBLE or r.unit_column:
            continue
        clean = v[~np.isin(v, list(cl.sentinels.get(c, ())))]
        f = _unit_finding(c, r, clean)
        if f:
            if f["kind"] == "mixed_units":
                cl.keep_range[c] = f["keep"]
            found.append(f)
    return found


def _implausible(value: float, r) -> tuple | None:
    """The plausible range ``value`` lies outside of (None when inside, or no range is known)."""
    if r is None or not r.quantity:
        return None
    units = [r.unit] if r.unit and not r.unit_column else units_for(r.quantity) or [None]
    ranges = [plausible_range(r.quantity, u) for u in units]
    ranges = [x for x in ranges if x]
    if ranges and all(not (lo <= value <= hi) for lo, hi in ranges):
        lo, hi = plausible_range(r.quantity, r.unit) or ranges[0]
        return (lo, hi, r.unit or PLAUSIBLE[r.quantity][2])
    return None


def _unit_finding(c: str, r, v: np.ndarray, w: np.ndarray | None = None) -> dict | None:
    """mixed_units or wrong_unit for one running variable, from its values ``v`` (profiled
    rows; or bin means with row counts ``w``)."""
    q = r.quantity
    weighted = w is not None
    w = np.asarray(w, float) if weighted else np.ones(v.size)
    total = float(w.sum())
    if total < MIXED_MIN:
        return None

    def share(mask):
        return float(w[mask].sum()) / total

    def median(mask):
        if not weighted:
            return float(np.median(v[mask]))
        return float(weighted_quantile(v[mask], w[mask], 0.5))
    ranges = {u: plausible_range(q, u) for u in units_for(q)}
    ranges = {u: x for u, x in ranges.items() if x}
    own = r.unit
    if own is None or plausible_range(q, own) is None:
        # no declared unit: read the column in the unit most values fit
        own = max(ranges, key=lambda u: share((v >= ranges[u][0]) & (v <= ranges[u][1])),
                  default=None)
        if own is None:
            return None
    lo, hi = plausible_range(q, own)
    inside = (v >= lo) & (v <= hi)
    others = {u: (v >= a) & (v <= b) for u, (a, b) in ranges.items()
              if plausible_range(q, u) != (lo, hi)}
    own_share = share(inside)
    everything = np.ones(v.size, bool)
    for u, fit in others.items():
        if own_share < 0.5 and share(fit) >= 0.9:
            return {"kind": "wrong_unit", "column": c, "declared": r.unit, "fits": u,
                    "range": (lo, hi), "median": median(everything)}
    if own_share < 0.5 and not others:
        return {"kind": "wrong_unit", "column": c, "declared": r.unit, "fits": None,
                "range": (lo, hi), "median": median(everything)}
    need = max(MIXED_MIN, MIXED_SHARE * total)
    for u, fit in others.items():
        only = fit & ~inside
        if w[only].sum() >= need and w[inside].sum() >= need:
            a, b = ranges[u]
            return {"kind": "mixed_units", "column": c, "own": own, "other": u, "keep": (lo, hi),
                    "other_range": (a, b), "declared": r.unit,
                    "median_other": median(only), "median_own": median(inside)}
    return None


def late_unit_findings(found: list[dict], spec, stats: dict, profiled: int,
                       rows_read: int | None = None) -> list[dict]:
    """Unit findings in the rows after the profile, from the bins of the whole table.

    The profile decides what the pass does about units, so a column whose unit changes after
    its first ``profiled`` rows (a laboratory that switched units mid-extract) would go
    unwarned.  The bins hold every row: checked again there, such a column gets its warning with
    ``late`` set — its rows were binned as read, not set missing.  The check is skipped only when
    the profile read the whole table (``rows_read`` ≤ ``profiled``): comparing a column's own
    values with ``profiled`` would skip a column with many missing values.
    """
    seen = {f["column"] for f in found if f["kind"] in ("mixed_units", "wrong_unit")}
    out = []
    for r in spec.running:
        c = r.column
        st = stats.get(c)
        if (c in seen or st is None or r.unit_column or not r.quantity
                or r.quantity not in PLAUSIBLE
                or (rows_read if rows_read is not None else st.total) <= profiled):
            continue
        p = st.pooled()
        ok = p.n > 0
        f = _unit_finding(c, r, p.x[ok], p.n[ok])
        if f:
            # In the long layout the profile's rows are shared among the running variables
            # (or are the stream's first rows), so no row count of this column can be named.
            f["late"] = profiled if spec.layout is None else None
            out.append(f)
    return out


# ---------------------------------------------------------------------- messages
def parse_warnings(cl, spec, value_map_sources: dict) -> list[dict]:
    """decimal_comma and value_map warnings from the counts of the pass."""
    out = []
    for c, k in (cl.reader.comma_cells if cl.reader else {}).items():
        if k and spec.decimal != ",":
            ex = cl.reader.example.get(c, "6,5")
            out.append(warning("decimal_comma", c,
                f"column '{c}': {k:,} cells hold numbers with a decimal comma (such as {ex!r}) "
                f"and were read as decimals ({ex.replace('.', '').replace(',', '.')}). If the file uses commas as decimal marks, say so "
                "with [data] decimal = \",\"; if they are thousands separators, set "
                "decimal = \".\" and cutscan will refuse the cells instead.", k))
    for c, k in cl.mapped.items():
        if not k:
            continue
        m = cl.value_maps[c]
        how = ", ".join(f"{key!r} → {val:g}" for key, val in m.items())
        src = value_map_sources.get(c, "data.value_map")
        fix = ("set [data.value_map] " + c + " = { ... } to read them otherwise"
               if src != "data.value_map" else "edit data.value_map to change it")
        out.append(warning("value_map", c,
            f"column '{c}': {k:,} cells were recoded by {src} ({how}); {fix}.", k))
    return out


def findings_to_warnings(found: list[dict], cl, stats: dict, spec) -> list[dict]:
    """The profile's findings as warnings, with the exact counts of the pass."""
    out = []
    for f in found:
        c = f["column"]
        if f["kind"] == "sentinel_values":
            s = f["value"]
            key = f"[data.missing_by_column] {c} = [{s:g}]"
            if f["dropped"]:
                k = cl.sentinel_hits.get(c, {}).get(s, 0)
                lo, hi, unit = f["range"]
                out.append(warning("sentinel_values", c,
                    f"column '{c}': {_n(k)} hold {s:g}, a spike outside the bulk of the values "
                    f"and outside the plausible range of {_quantity(spec, c)} ({_g(lo)}–{_g(hi)} "
                    f"{unit}); they were treated as missing. Declare the code with {key} to make "
                    "this explicit.", k))
            else:
                k = cl.watched.get(c, {}).get(s, 0)
                out.append(warning("sentinel_values", c,
                    f"column '{c}': {_n(k)} hold {s:g}, a spike outside the bulk of the values "
                    f"that looks like a missing-value code; they were kept as values. If {s:g} "
                    f"means 'not recorded', declare it with {key}.", k))
        elif f["kind"] == "mixed_units" and "unit_column" in f:
            conv = cl.converted.get(c, {})
            target = _running(spec, c).unit
            parts = ", ".join(f"{_n(k)} in {u}" for u, k in sorted(conv.items()))
            moved = sum(k for u, k in conv.items() if u != target)
            if moved:
                empty = cl.unit_missing.get(c, 0)
                tail = (f"; {_n(empty)} with an empty unit cell were read as {target}" if empty else "")
                out.append(warning("mixed_units", c,
                    f"column '{c}' holds two units by its unit column '{f['unit_column']}' "
                    f"({parts}); {_n(moved)} were converted to {target} row by row{tail}.",
                    moved))
        elif f["kind"] == "mixed_units" and "late" in f:
            st = stats[c]
            lo, hi = f["keep"]
            a, b = f["other_range"]
            k = _rows_outside(st, lo, hi, within=(a, b))     # the rows the message describes
            when = (f"after its first {f['late']:,} rows" if f["late"] is not None else
                    "after the rows profiled before the pass")
            out.append(warning("mixed_units", c,
                f"column '{c}' seems to hold two units of {_running(spec, c).quantity} "
                f"{when}: {_n(k)} lie outside the plausible range of "
                f"{f['own']} ({_g(lo)}–{_g(hi)}) and fit only {f['other']} (median "
                f"{_g(f['median_other'])}, plausible {_g(a)}–{_g(b)}). They were seen only after "
                "the rows that decide how units are handled, so they were kept as they are, "
                f"and candidates among them are in {f['other']}. Name each row's "
                f"unit with unit_column = \"...\" in the [[running]] table of '{c}', or split "
                "the extract by unit.", k))
        elif f["kind"] == "mixed_units":
            k = cl.out_of_range.get(c, 0)
            lo, hi = f["keep"]
            a, b = f["other_range"]
            kept = stats[c].total if c in stats else 0
            share = kept / (kept + k) if kept + k else 1.0
            most = (f"More than half the rows fit only {f['other']}: if the whole column is in "
                    f"{f['other']}, set unit = \"{f['other']}\" there instead. " if share < 0.5 else "")
            out.append(warning("mixed_units", c,
                f"column '{c}' seems to hold two units of {_running(spec, c).quantity}: "
                f"{share:.0%} of the values fit {f['own']} (median {_g(f['median_own'])}, "
                f"plausible {_g(lo)}–{_g(hi)}) but the others fit only {f['other']} (median "
                f"{_g(f['median_other'])}, plausible {_g(a)}–{_g(b)}). {_n(k)} outside "
                f"{_g(lo)}–{_g(hi)} were set missing; values inside it are kept as {f['own']}. "
                f"{most}If a column holds each row's unit, name it with unit_column = \"...\" in "
                f"the [[running]] table of '{c}' so rows are converted instead.", k))
        elif f["kind"] == "wrong_unit":
            st = stats.get(c)
            lo, hi = f["range"]
            k = _rows_outside(st, lo, hi) if st is not None else 0
            unit = f["declared"] or "(none declared)"
            fix = (f"set unit = \"{f['fits']}\" in the [[running]] table of '{c}'" if f["fits"]
                   else "check the column's quantity and unit")
            out.append(warning("wrong_unit", c,
                f"column '{c}': {_n(k)} lie outside the plausible range of "
                f"{_running(spec, c).quantity} in {unit} ({_g(lo)}–{_g(hi)}); the median is "
                f"{_g(f['median'])}" + (f", which fits {f['fits']}" if f["fits"] else "") +
                (f". Its first {f['late']:,} rows fitted {unit}, so the rows after them were "
                 "binned as read" if "late" in f else "") +
                f". Rules were converted to {unit} and may miss the data: {fix}.", k))
    return out


def _running(spec, column):
    return next(r for r in spec.running if r.column == column)


def _quantity(spec, column) -> str:
    r = next((r for r in spec.running if r.column == column), None)
    return r.quantity if r and r.quantity else column


def _rows_outside(st, lo: float, hi: float, within=None) -> int:
    """Rows of the bins outside lo–hi (and, with ``within`` = (a, b), inside a–b)."""
    p = st.pooled()
    x = p.x
    keep = (p.n > 0) & ((x < lo) | (x > hi))
    if within is not None:
        keep &= (x >= within[0]) & (x <= within[1])
    return int(p.n[keep].sum())


# ---------------------------------------------------------------------- rules and columns
def rule_warnings(spec, rules, stats: dict, rule_cutoff) -> list[dict]:
    """cutoff_off_lattice and rule_outside_data, one per (running variable, rule)."""
    out = []
    for r in spec.running:
        if not r.quantity or r.column not in stats:
            continue
        trs = set(r.treatments or spec.treatments)
        x, n = stats[r.column].support_counts()
        if x.size == 0:
            continue
        exact = stats[r.column].kind == "exact"
        for rule in rules:
            if rule.quantity != r.quantity or (rule.treatments and not trs & set(rule.treatments)):
                continue
            c = rule_cutoff(rule, r)
            stated = f"{rule.cutoff:g} {rule.unit or ''}".strip()
            conv = (f" ({stated} converted to {r.unit})" if c != rule.cutoff else "")
            where = f"rule '{rule.id}' cutoff {_g(c)}{conv}"
            if c < x[0] or c > x[-1]:
                out.append(warning("rule_outside_data", r.column,
                    f"{where} lies outside the values of '{r.column}' ({_g(x[0])} to {_g(x[-1])}, "
                    f"{int(n.sum()):,} rows), so it cannot be estimated. Check unit (now "
                    f"{r.unit or 'none'}) and quantity in the [[running]] table of '{r.column}', "
                    "or the rule's unit and cutoff."))
                continue
            tol = 1e-9 * max(1.0, abs(c))
            if exact and not np.isclose(x, c, rtol=0, atol=tol).any():
                below, above = x[x < c][-1], x[x > c][0]
                k_lo, k_hi = n[x < c][-1], n[x > c][0]
                side = ("at or above" if rule.right_closed else "above")
                out.append(warning("cutoff_off_lattice", r.column,
                    f"{where} falls between the recorded values {_g(below)} and {_g(above)} of "
                    f"'{r.column}'. The rule's inequality ({rule.eligible.replace('_', ' ')} "
                    f"{_g(c)}) puts rows at {_g(below)} ({_n(k_lo)}) below the line and rows at "
                    f"{_g(above)} ({_n(k_hi)}) {side} it, so the candidate is the split between "
                    f"{_g(below)} and {_g(above)} (declared value {_g(c)}, first value on the "
                    f"right {_g(above)}). If the rule is applied to a rounded value, state its "
                    "cutoff on the recorded scale in the catalogue.", k_lo + k_hi))
    return out


def no_variation(spec, stats: dict) -> list[dict]:
    """Treatments and covariates holding one value in every row where they are present."""
    out, seen = [], set()
    for r in spec.running:
        st = stats.get(r.column)
        if st is None:
            continue
        for col in list(r.treatments or spec.treatments) + list(spec.covariates):
            if col in seen or col not in st.columns:
                continue
            seen.add(col)
            x, cnt, s1, s2 = st.column_sums(col)     # totals need no pooling over periods
            k = cnt.sum()
            if k <= 0:
                continue
            mean = s1.sum() / k
            var = s2.sum() / k - mean ** 2
            if var <= 1e-12 * max(1.0, mean ** 2):
                role = "treatment" if col in spec.treatments else "covariate"
                out.append(warning("no_variation", col,
                    f"{role} '{col}' is {mean:g} in every one of {k:,.0f} rows where it is "
                    f"recorded, so it can show no jump{' or imbalance' if role == 'covariate' else ''}; "
                    f"check the column (a filter upstream?) or drop it from [{role}s] columns.", k))
    return out


def note_warnings(notes: list[str]) -> tuple[list[dict], list[str]]:
    """Old-style "warning: ..." notes that are data-quality findings, as structured warnings."""
    out, rest = [], []
    for n in notes:
        if isinstance(n, dict):
            out.append(n)
        else:
            rest.append(n)
    return out, rest


def period_warnings(problems: dict | None) -> list[dict]:
    """``period_dates``: observation-period rows (long layout) that cannot be observed time —
    a start or end date missing, or an end before the start — and were left out of it.  An
    index row whose only period was such a row is counted in ``data.dropped`` as "window not
    observed"; this says why, so a swapped pair of date columns is not read as sparse follow-up."""
    if not problems:
        return []
    out = []
    for key, what in (("reversed", "end before they start"),
                      ("undated", "lack a start or end date")):
        k = problems[key]
        if k:
            out.append(warning(
                "period_dates", None,
                f"{problems['source']}: {k:,} of {problems['rows']:,} observation-period rows "
                f"{what}; they were left out of observed time, so index rows they alone would "
                "cover count as 'window not observed' in data.dropped. Check the period's date "
                "columns (swapped start and end?) and fix or drop those rows.", k))
    return out
