"""Guards of the scan against messy input and faults (issue 9): keep-first de-duplication,
the repeated-unit warning, rule-catalogue pre-checks, and containment of numerical failures so
that one degenerate candidate cannot stop a scan.  scan.py calls these; they hold no state.
"""
from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .errors import InputError
from .io import open_table
from .parsing import FALSE_TOKENS, NULL_TOKENS, TRUE_TOKENS, DateParser, to_timestamps
from .rules import load_rules
from .spec import ScanSpec


def keep_first(table, spec: ScanSpec, needed: list[str]):
    """One row per unit and running variable: the unit's earliest row that holds that value.

    For each running variable the row kept for a unit is its earliest dated row *with a value of
    that variable*, so a person whose first visit had no HbA1c still enters the HbA1c analyses
    with the first visit that had one (and that row's treatments and covariates).  The table
    keeps the union of those rows and of each unit's earliest row; in a kept row, a running
    variable whose value is not that unit's first is set missing for that variable alone.

    Ties on the date keep the row that comes first in the file; rows with a missing date count
    as later than any dated row; rows with a missing unit cannot be matched to a unit and are
    dropped (counted separately).  The rows kept stay in file order, so the seeded half split is
    unchanged by the de-duplication.

    This runs in memory: the needed columns of every row are held at once (about 8 bytes per
    number plus the identifier text), which suits tables up to some tens of millions of rows on
    a 24 GB machine.  For larger tables de-duplicate upstream (one row per unit) and scan that.

    Returns (table, repeat rows dropped, rows dropped for a missing unit); the table's
    ``blanked`` maps each running variable to the values set missing because they were not the
    unit's first.
    """
    import pandas as pd
    import pyarrow as pa
    cols = list(dict.fromkeys(needed + [spec.unit, spec.date]))
    parts = list(table.batches(cols))
    if not parts:
        return table, 0, 0
    t = pa.Table.from_batches(parts)
    when = to_timestamps(t.column(spec.date).combine_chunks(), spec.date, table.name,
                         DateParser(spec.date, table.name, spec.date_format))
    frame = pd.DataFrame({"unit": t.column(spec.unit).to_pandas(),
                          "when": pd.Series(when.to_pandas()), "row": np.arange(t.num_rows)})
    no_unit = frame["unit"].isna() | frame["unit"].astype(str).str.strip().str.lower().isin(NULL_TOKENS)
    order = frame[~no_unit].sort_values(["when", "row"], kind="stable", na_position="last")
    keep = np.zeros(t.num_rows, bool)
    keep[order.drop_duplicates("unit", keep="first")["row"].to_numpy()] = True
    firsts = {}
    for r in spec.running:
        x = np.asarray(t.column(r.column).to_numpy(), dtype=float)
        has = ~np.isnan(x)
        rows = order[has[order["row"].to_numpy()]].drop_duplicates("unit", keep="first")["row"]
        mine = np.zeros(t.num_rows, bool)
        mine[rows.to_numpy()] = True
        firsts[r.column] = (mine, has)
        keep |= mine
    blanked, arrays = {}, {}
    for col, (mine, has) in firsts.items():
        drop = keep & has & ~mine
        blanked[col] = int(drop.sum())
        if blanked[col]:
            x = np.asarray(t.column(col).to_numpy(), dtype=float).copy()
            x[drop] = np.nan
            arrays[col] = pa.array(x, type=pa.float64(), from_pandas=True)
    for col, arr in arrays.items():
        t = t.set_column(t.schema.get_field_index(col), col, arr)
    idx = np.flatnonzero(keep)
    repeats = int((~no_unit).sum() - idx.size)
    out = open_table(t.take(pa.array(idx)), table.name)
    out.blanked = blanked
    return out, repeats, int(no_unit.sum())


# Names that mean "a person" (not a clinic, provider or visit, which repeat by design).
UNIT_NAME = re.compile(r"^(id|pid|(person|patient|member|subject|client|beneficiary)(_?(id|no|number))?)$",
                       re.IGNORECASE)
UNIT_CHECK_ROWS = 200_000
ID_MIN_DISTINCT = 20         # an identifier has at least this many distinct values ...
ID_MIN_RATIO = 0.05          # ... and at least one per 20 rows (clinics and codes have fewer)
ID_MAX_ROWS = 50             # ... and 99 % of its values appear on at most this many rows


def _id_like(arr) -> bool:
    t = arr.type.value_type if pa.types.is_dictionary(arr.type) else arr.type
    if pa.types.is_integer(t) or pa.types.is_string(t) or pa.types.is_large_string(t):
        return True
    if pa.types.is_floating(t):          # CSV integers arrive as float64
        v = arr.drop_null().to_numpy(zero_copy_only=False)
        return v.size > 0 and bool(np.all(v == np.floor(v)))
    return False


def _repetition(arr):
    """(rows, distinct values, rows repeating an earlier value, 99th percentile rows per value)."""
    arr = arr.drop_null()
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type):
        arr = arr.filter(pc.invert(pc.is_in(pc.utf8_lower(pc.utf8_trim_whitespace(arr)),
                                            value_set=pa.array(NULL_TOKENS))))
    counts = pc.value_counts(arr).field("counts").to_numpy(zero_copy_only=False)
    if counts.size == 0:
        return 0, 0, 0, 0
    return len(arr), counts.size, int(len(arr) - counts.size), float(np.quantile(counts, 0.99))


def unit_repeats(table, spec: ScanSpec) -> list[dict]:
    """``repeated_units`` warnings: a unit column whose units have several rows each.

    The declared ``data.unit`` is checked when ``keep`` is "all" (with keep = "first" the spec
    already counts each unit once, and nothing is said).  Without ``data.unit`` every column
    that is not scanned is screened by its repetition pattern, not its name alone: integer or
    text values, at least ID_MIN_DISTINCT distinct values and one per 1/ID_MIN_RATIO rows, 99 %
    of values on at most ID_MAX_ROWS rows, and some values repeating; a column named like a
    person identifier needs only to repeat.  Only the first ``UNIT_CHECK_ROWS`` rows are read.
    The advice never repeats a key the spec already sets.
    """
    from .quality import warning
    if spec.keep == "first":
        return []
    scanned = set(roles(spec)) | {spec.date} | {r.unit_column for r in spec.running}
    names = [spec.unit] if spec.unit else [c for c in table.columns if c not in scanned]
    if not names:
        return []
    try:
        first = next(iter(table.batches(names, UNIT_CHECK_ROWS)), None)
    except InputError:
        return []
    if first is None or first.num_rows == 0:
        return []
    for col in names:
        arr = first.column(first.schema.get_field_index(col))
        if not spec.unit and not _id_like(arr):
            continue
        rows, distinct, repeats, p99 = _repetition(arr)
        if not repeats:
            continue
        named = bool(UNIT_NAME.search(col))
        if not (spec.unit or named) and not (distinct >= ID_MIN_DISTINCT and
                                             distinct >= ID_MIN_RATIO * rows and p99 <= ID_MAX_ROWS):
            continue
        # "N rows of the first …": the count sits next to its noun, so outputs can suppress it
        seen = (f"{repeats:,} row{'s' if repeats != 1 else ''} of the first {first.num_rows:,} "
                f"share a value with an earlier row; {distinct:,} distinct values")
        if spec.unit:
            need = "" if spec.date else " and data.date (the column that orders a unit's rows)"
            msg = (f"column '{col}' is data.unit and repeats ({seen}), so units with many rows "
                   f"count many times; add data.keep = \"first\"{need} to count each unit once, "
                   "by its earliest row holding each running variable.")
        else:
            why = "is named like a unit identifier" if named else "repeats like a unit identifier"
            msg = (f"column '{col}' {why} ({seen}), so units with many rows count many times; "
                   f"if it identifies persons, add data.unit = \"{col}\" and data.keep = \"first\" "
                   "(with data.date) to count each unit once, or data.unit alone to keep every row "
                   "and split the held-out half by unit.")
        return [warning("repeated_units", col, msg, repeats)]
    return []


def checked_rules(paths) -> list:
    """load_rules, after checking each catalogue is readable UTF-8 TOML (clean errors, no traceback)."""
    from .errors import SpecError, parse_toml, read_text
    text_keys = ("id", "quantity", "unit", "description", "source")
    for p in paths:
        if not Path(p).exists():
            continue
        raw = parse_toml(read_text(p, "rule catalogue"), p, "rule catalogue")
        entries = raw.get("rule", [])
        if not isinstance(entries, list) or not all(isinstance(r, dict) for r in entries):
            raise SpecError(f"{p}: 'rule' must be a list of [[rule]] tables.")
        for i, r in enumerate(entries, 1):
            bad = [k for k in text_keys if k in r and not isinstance(r[k], str)]
            tr = r.get("treatments")
            if tr is not None and not (isinstance(tr, list) and all(isinstance(t, str) for t in tr)):
                bad.append("treatments")
            cut = r.get("cutoff")
            if isinstance(cut, float) and not math.isfinite(cut):
                raise SpecError(f"{p}: rule number {i} has cutoff = {cut}; a cutoff must be a "
                                "finite number.")
            if bad:
                raise SpecError(f"{p}: rule number {i} has '{bad[0]}' of the wrong type; id, "
                                "quantity, unit, description and source are text, treatments a "
                                "list of column names.")
    return load_rules(paths)


NUMERIC_FAILURES = (np.linalg.LinAlgError, FloatingPointError, ZeroDivisionError, OverflowError)


def evaluate_contained(evaluate, stats, cand, spec: ScanSpec, cache: dict) -> dict:
    """:func:`evaluate`, with a numerical failure kept to its own candidate.

    A step that raises on degenerate sums (a singular matrix in a bandwidth pilot, say) turns the
    candidate into a "not estimable" row naming the failure; the scan goes on.
    """
    try:
        return evaluate(stats, cand, spec, cache)
    except NUMERIC_FAILURES as exc:
        nan = float("nan")
        row = {k: nan for k in ("jump", "se", "ci_low", "ci_high", "p_value", "z", "first_stage_f",
                                "left", "right", "slope_left", "slope_right", "bandwidth",
                                "density_p", "density_theta", "density_ratio", "balance_p",
                                "placebo_p")}
        row.update(running=cand.running, treatment=cand.treatment, cutoff=float(cand.cutoff),
                   origin=cand.origin, rule_id=cand.rule_id, eligible_side=cand.eligible_side,
                   rule_description=cand.rule.description if cand.rule else None,
                   bandwidth_method=None, bandwidth_note=None, kernel=spec.kernel,
                   degree=spec.degree, n_left=0, n_right=0, distinct_left=0, distinct_right=0,
                   right_closed=cand.right_closed, design="unknown", density_method=None,
                   density_reason=None, balance=[], balance_worst=None, heap_p=None,
                   heap_ratio=None, heap_value=None,
                   reason=f"numerical failure ({type(exc).__name__}: {exc}); the sums near this "
                          "cutoff are degenerate — values of extreme magnitude, or too few distinct values")
        return row


def explain_nan(row: dict) -> None:
    """Give every estimate that came out NaN a reason (a "not estimable" row always says why).

    The fit can lose all precision without raising — sums of x² overflow for |x| near 1e154 and
    above, or underflow for spacings near 1e-160 and below — which leaves NaN with no reason.
    """
    if not np.isfinite(row.get("jump", np.nan)) and not row.get("reason"):
        row["reason"] = ("the local fit lost precision (running-variable values or spacings of "
                         "extreme magnitude overflow or underflow the sums); rescale the running "
                         "variable, e.g. to thousands or millionths")


def text_columns(spec: ScanSpec) -> list[str]:
    """CSV columns read as text: the unit (keeps leading zeros), columns with text codes or a
    value map, unit columns, and every scanned column when the spec declares decimal commas
    (so that a column of whole numbers in its first rows cannot fail on '6,5' further down)."""
    cols = [spec.unit] if spec.unit else []
    cols += [c for c, cc in spec.codes().items() if any(isinstance(v, str) for v in cc)]
    cols += list(spec.value_map) + [r.unit_column for r in spec.running if r.unit_column]
    if spec.decimal == ",":
        cols += list(roles(spec))
    return list(dict.fromkeys(cols))


YES_NO = {**{t: 1.0 for t in TRUE_TOKENS}, **{t: 0.0 for t in FALSE_TOKENS}}


def cleaning_for(table, spec: ScanSpec):
    """The :class:`scanner.cleaning.Cleaning` of a scan: codes, decimal mark, value maps and units.

    Value maps come from ``data.value_map``, and, for columns it does not name, from Stata value
    labels that read yes/no (1 = "yes", 2 = "no" → 1/0): those are the 0/1 flags of a .dta file.
    Returns the cleaning and, per mapped column, where its map came from (for the warning).
    """
    from .cleaning import Cleaning, UnitColumn
    maps, sources = dict(spec.value_map), {}
    scanned = roles(spec)
    for col, labels in (getattr(table, "value_labels", None) or {}).items():
        if col in maps or col not in scanned:
            continue
        words = {code: str(text).strip().lower() for code, text in labels.items()}
        if words and set(words.values()) <= set(YES_NO) and len({YES_NO[w] for w in words.values()}) == 2:
            maps[col] = {f"{code:g}": YES_NO[w] for code, w in words.items()}
            maps[col].update({w: YES_NO[w] for w in words.values()})
            sources[col] = "its Stata value labels (" + ", ".join(
                f"{code:g} = {labels[code]!r}" for code in labels) + ")"
    units = {r.column: UnitColumn(r.unit_column, dict(r.unit_map), r.unit, r.quantity)
             for r in spec.running if r.unit_column}
    return Cleaning(spec.codes(), scanned, spec.date, spec.date_format, decimal=spec.decimal,
                    value_maps=maps, units=units), sources


def roles(spec: ScanSpec) -> dict:
    roles = {c: "outcome" for c in spec.outcomes}
    roles.update({c: "covariate" for c in spec.covariates})
    roles.update({c: "treatment" for c in spec.treatments})
    roles.update({r.column: "running variable" for r in spec.running})
    return roles


def add_cleaning_info(info: dict, coded: dict, spec: ScanSpec, no_unit: int) -> None:
    """Record values set missing by declared codes and rows without a unit (keep = first)."""
    if no_unit:
        info["dropped"].insert(0, {"column": spec.unit, "treatment": None,
                                   "reason": "unit missing (keep = first)", "rows": no_unit})
        info["rows_read"] += no_unit
    info["missing_codes"] = [{"column": c, "codes": list(spec.codes()[c]), "values": n}
                             for c, n in coded.items() if c in spec.codes()]


