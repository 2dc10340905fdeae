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
from .parsing import NULL_TOKENS, DateParser, to_timestamps
from .rules import load_rules
from .spec import ScanSpec


def keep_first(table, spec: ScanSpec, needed: list[str]):
    """One row per unit: its earliest row by date.

    Ties on the date keep the row that comes first in the file; rows with a missing date count
    as later than any dated row; rows with a missing unit cannot be matched to a unit and are
    dropped (counted separately).  The rows kept stay in file order, so the seeded half split is
    unchanged by the de-duplication.

    This runs in memory: the needed columns of every row are held at once (about 8 bytes per
    number plus the identifier text), which suits tables up to some tens of millions of rows on
    a 24 GB machine.  For larger tables de-duplicate upstream (one row per unit) and scan that.

    Returns (table, repeat rows dropped, rows dropped for a missing unit).
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
    frame = frame[~no_unit].sort_values(["when", "row"], kind="stable", na_position="last")
    keep = np.sort(frame.drop_duplicates("unit", keep="first")["row"].to_numpy())
    repeats = int((~no_unit).sum() - keep.size)
    return open_table(t.take(pa.array(keep)), table.name), repeats, int(no_unit.sum())


# Names that mean "a person" (not a clinic, provider or visit, which repeat by design).
UNIT_NAME = re.compile(r"^(id|pid|(person|patient|member|subject|client|beneficiary)(_?(id|no|number))?)$",
                       re.IGNORECASE)
UNIT_CHECK_ROWS = 1_000_000


def unit_repeats(table, spec: ScanSpec) -> str | None:
    """A warning when a unit column (declared, or named like one) repeats and keep != 'first'.

    Only the first ``UNIT_CHECK_ROWS`` rows are looked at: a repeat there is enough to warn, and
    the check stays cheap on large tables.
    """
    if spec.keep == "first":
        return None
    names = [spec.unit] if spec.unit else [c for c in table.columns if UNIT_NAME.search(c)]
    for col in names:
        try:
            first = next(iter(table.batches([col], UNIT_CHECK_ROWS)), None)
        except InputError:
            continue
        if first is None or first.num_rows == 0:
            continue
        arr = first.column(0).drop_null()
        if pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type):
            arr = arr.filter(pc.invert(pc.is_in(pc.utf8_lower(pc.utf8_trim_whitespace(arr)),
                                                value_set=pa.array(NULL_TOKENS))))
        repeats = len(arr) - len(pc.unique(arr))
        if repeats:
            how = "declared as data.unit" if spec.unit else "looks like a unit identifier"
            return (f"warning: column '{col}' {how} and repeats ({repeats:,} of the first "
                    f"{first.num_rows:,} rows share a value with an earlier row), so units with "
                    f"many rows count many times; add data.unit = '{col}' and data.keep = 'first' "
                    "to count each unit once, by its earliest date.")
    return None



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
    """CSV columns read as text: the unit (keeps leading zeros) and columns with text codes."""
    cols = [spec.unit] if spec.unit else []
    cols += [c for c, cc in spec.codes().items() if any(isinstance(v, str) for v in cc)]
    return cols


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


