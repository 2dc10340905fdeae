"""Disclosure control for everything cutscan writes: small-cell suppression and bin merging.

Rule (US CMS cell size suppression policy, ResDAC, version of 01/26/2024): no count of persons,
rows or events from 1 to 10 may be shown, and such a value must not be recoverable from other
cells, totals or percentages (complementary suppression).  Zero may be shown.  cutscan applies
the rule with a configurable minimum cell size ``min_cell`` (default 11): counts from 1 to
``min_cell − 1`` are suppressed.

Three tools:

* :func:`protect_group` — suppress the small parts of a group whose total is shown, and add
  complementary suppressions until the suppressed parts together hold at least ``min_cell``
  (so subtraction from the total reveals only a sum that is itself allowed).
* :func:`merge_sparse` — merge display bins with their neighbours (same side of the cutoff only)
  until every bin holds at least ``min_cell`` rows, and, for 0/1 columns, until the number of
  ones and of zeros in each bin is 0 or at least ``min_cell`` (a share with its bin size would
  otherwise reveal a small count).  A side that cannot be made safe is hidden.
* :func:`scrub` — a last pass over the results dict: any integer under a count-named key that
  lies in 1..min_cell−1 is replaced by null and recorded.  It catches count fields added by
  other parts of the scan.
"""
from __future__ import annotations

import re

import numpy as np

# Keys that hold counts of rows or persons (exact names, or names matching COUNT_PATTERN).
COUNT_PATTERN = re.compile(r"^(n|rows|count|counts|n_left|n_right|n_(?!tested|candidates|bins|"
                           r"cutoffs|periods|covariates)\w+|\w+_(n|rows|count))$")
# Integer keys that are not counts of persons (ranks, orders, numbers of tests or bins).
META_INT_KEYS = frozenset({
    "rank", "degree", "distinct_left", "distinct_right", "n_tested", "n_candidates", "n_bins",
    "min_cell", "top", "seed", "min_rows", "batch_rows", "suppressed_counts", "suppressed_bins",
    "hidden_bins", "merged_bins", "bins_left", "bins_right", "bins_imse_left", "bins_imse_right",
    "year", "period", "n_cutoffs", "n_periods", "n_covariates", "hidden_sides",
    # numbers of cutoffs examined, not of persons
    "placebo_exceed", "placebo_n", "n_grid_points", "grid_points", "n_scans",
    # steps of the sequential break search and how many tests it ran
    "step", "search_step", "n_search_tests",
})


def is_small(count, min_cell: int) -> bool:
    """True for a count that must not be shown (1 .. min_cell − 1)."""
    return count is not None and 0 < count < min_cell


def suppress(count, min_cell: int):
    """None for a count of 1..min_cell-1, else the count."""
    if count is None:
        return None
    return None if is_small(count, min_cell) else count


def protect_group(parts: list, min_cell: int, total_shown: bool = True) -> tuple[list, bool]:
    """Suppress small parts of a group, with complementary suppression when the total is shown.

    Parameters
    ----------
    parts : counts of the group's cells (None = not shown anyway).
    min_cell : minimum cell size.
    total_shown : whether the group's total appears elsewhere (then one suppressed cell, or
        suppressed cells that together hold fewer than ``min_cell``, could be recovered).

    Returns
    -------
    (shown, total_ok): the parts with suppressed ones as None, and whether the total may be shown.

    Notes
    -----
    CMS cell size suppression policy (complementary suppression); the next-smallest cells are
    suppressed first, which loses the least information.
    """
    shown = [None if is_small(p, min_cell) else p for p in parts]
    hidden = [i for i, p in enumerate(parts) if p is not None and shown[i] is None]
    if not hidden or not total_shown:
        return shown, True
    def hidden_sum():
        return sum(parts[i] for i in hidden)
    while len(hidden) < 2 or hidden_sum() < min_cell:
        rest = sorted((p, i) for i, p in enumerate(shown) if p)
        if not rest:
            return shown, not is_small(hidden_sum(), min_cell)
        _, i = rest[0]
        shown[i] = None
        hidden.append(i)
    return shown, True


def _unsafe(n, ones, binary, min_cell) -> bool:
    if is_small(n, min_cell):
        return True
    return bool(binary and (is_small(round(ones), min_cell) or is_small(round(n - ones), min_cell)))


def merge_sparse(n, ones, binary: bool, min_cell: int, keep_empty: bool = False):
    """Groups of adjacent bins (ordered from the cutoff outward) that are safe to show.

    Parameters
    ----------
    n : rows per bin, ordered from the cutoff outward on one side.
    ones : Σy per bin (the number of ones for a 0/1 column).
    binary : whether the column is 0/1 (then ones and zeros are counts too).
    min_cell : minimum cell size.

    Returns
    -------
    list of index lists (bins merged into one display bin); empty when the side must be hidden.
    Empty bins are dropped (they show nothing) unless ``keep_empty`` (a histogram shows a zero
    height).  A sparse bin is merged with its outer
    neighbour, or its inner neighbour when it is the outermost, which keeps the bins next to
    the cutoff as narrow as the data allow.
    """
    groups = [[i] for i in range(len(n)) if keep_empty or n[i] > 0]
    tot = lambda g, a: float(sum(a[i] for i in g))  # noqa: E731
    while groups:
        bad = [k for k, g in enumerate(groups) if _unsafe(tot(g, n), tot(g, ones), binary, min_cell)]
        if not bad:
            return groups
        if len(groups) == 1:
            return []
        k = bad[0]
        j = k + 1 if k + 1 < len(groups) else k - 1
        a, b = sorted((k, j))
        groups[a:b + 1] = [groups[a] + groups[b]]
    return groups


def is_binary(s1, s2) -> bool:
    """A column whose bins have Σy = Σy² and whole-number Σy holds only 0/1 values."""
    s1, s2 = np.asarray(s1, float), np.asarray(s2, float)
    return bool(np.allclose(s1, s2) and np.allclose(s1, np.round(s1)))


# Counts written into sentences ("8 rows hold 999"): the same rule applies to them.
COUNT_IN_TEXT = re.compile(r"(?<![\d.,])(\d{1,3}(?:,\d{3})+|\d+) (rows?|cells?|persons?|people|visits?)\b('s)?")
TEXT_KEYS = {"message", "notes", "reasons", "reason"}
PLURAL = {"row": "rows", "cell": "cells", "person": "persons", "visit": "visits"}


def scrub_text(text: str, min_cell: int) -> str:
    """``text`` with every count of rows, cells, persons or visits from 1 to ``min_cell − 1``
    written as "fewer than ``min_cell``"."""
    def small(m):
        k = int(m.group(1).replace(",", ""))
        noun = PLURAL.get(m.group(2), m.group(2))
        if m.group(3):               # "1 person's rows" → "fewer than 11 persons' rows"
            noun = noun + "'" if noun.endswith("s") else noun + "'s"
        return f"fewer than {min_cell} {noun}" if is_small(k, min_cell) else m.group(0)
    return COUNT_IN_TEXT.sub(small, text)


def scrub(obj, min_cell: int, path: str = "", found: list | None = None):
    """Replace every small integer under a count-named key by None, and small counts written in
    messages, notes and reasons by "fewer than ``min_cell``"; return (obj, paths)."""
    found = [] if found is None else found
    if isinstance(obj, str):
        key = re.sub(r"\[\d*\]$", "", path.rsplit(".", 1)[-1])
        return (scrub_text(obj, min_cell) if key in TEXT_KEYS else obj), found
    if isinstance(obj, dict):
        out = {}
        for k, v in obj.items():
            p = f"{path}.{k}" if path else str(k)
            if (isinstance(v, (int, np.integer)) and not isinstance(v, bool)
                    and k not in META_INT_KEYS and COUNT_PATTERN.match(str(k))
                    and is_small(int(v), min_cell)):
                out[k] = None
                found.append(p)
            elif isinstance(v, list) and k not in META_INT_KEYS and COUNT_PATTERN.match(str(k)):
                out[k] = [None if isinstance(x, (int, np.integer)) and not isinstance(x, bool)
                          and is_small(int(x), min_cell) else scrub(x, min_cell, f"{p}[]", found)[0]
                          for x in v]
                found.extend(f"{p}[{i}]" for i, x in enumerate(v)
                             if isinstance(x, (int, np.integer)) and not isinstance(x, bool)
                             and is_small(int(x), min_cell))
            else:
                out[k] = scrub(v, min_cell, p, found)[0]
        return out, found
    if isinstance(obj, list):
        return [scrub(x, min_cell, f"{path}[{i}]", found)[0] for i, x in enumerate(obj)], found
    return obj, found


def _remerge(bins: list, key: str, min_cell: int, binary: bool, cutoff: float) -> tuple[list, int, int]:
    """Merge stored display bins again under a larger minimum cell size (one side at a time)."""
    out, merged, hidden = [], 0, 0
    for side in ("left", "right"):
        sb = sorted((b for b in bins if b["side"] == side), key=lambda b: abs(b["x_low"] + b["x_high"] - 2 * cutoff))
        n = np.array([b["n"] or 0 for b in sb], float)
        vals = np.array([b[key] for b in sb], float)
        widths = np.array([b["x_high"] - b["x_low"] for b in sb])
        ones = n * vals if key == "mean" else n
        groups = merge_sparse(n, ones, binary, min_cell, keep_empty=key != "mean")
        hidden += int(not groups and n.sum() > 0)
        merged += sum(len(g) - 1 for g in groups)
        for g in groups:
            ng = n[g].sum()
            nb = {"side": side, "x_low": min(sb[i]["x_low"] for i in g),
                  "x_high": max(sb[i]["x_high"] for i in g), "n": int(ng)}
            if key == "mean":
                nb["x"] = float(sum(sb[i]["x"] * n[i] for i in g) / ng)
                nb["mean"] = float(ones[g].sum() / ng)
            else:
                nb["height"] = float((vals[g] * widths[g]).sum() / (nb["x_high"] - nb["x_low"]))
            out.append(nb)
    return out, merged, hidden


def tighten(results: dict, min_cell: int) -> dict:
    """Re-apply disclosure control to a results dict with a larger minimum cell size.

    Counts are suppressed again, display bins are merged again from their stored counts, and
    the data accounting gets complementary suppression again.  A smaller ``min_cell`` than the
    one the results were written with cannot undo a suppression and is refused by the caller.
    """
    import copy
    r = copy.deepcopy(results)
    old = r["disclosure"]["min_cell"]
    if min_cell <= old:
        return r
    d = r["data"]
    before = (d.get("rows_read"), d.get("rows_used"))
    repeat = [x for x in d.get("dropped", []) if str(x.get("reason", "")).startswith("repeat rows")]
    shown, total_ok = protect_group([d.get("rows_used")] + [x["rows"] for x in repeat], min_cell)
    d["rows_used"] = shown[0]
    for x, v in zip(repeat, shown[1:]):
        x["rows"] = v
    if not total_ok:
        d["rows_read"] = None
    newly = sum(1 for a, b in zip(before, (d.get("rows_read"), d.get("rows_used")))
                if a is not None and b is None)
    for x in d.get("dropped", []):
        newly += is_small(x["rows"], min_cell)
        x["rows"] = suppress(x["rows"], min_cell)
    merged = hidden = 0
    for c in r["candidates"]:
        for f in ("n_left", "n_right"):
            newly += is_small(c.get(f), min_cell)
            c[f] = suppress(c.get(f), min_cell)
        for key, val in (("plot", "mean"), ("plot_density", "height")):
            p = c.get(key)
            if p and p.get("bins"):
                p["bins"], m1, h1 = _remerge(p["bins"], val, min_cell, p.get("binary", False),
                                             c["cutoff"])
                p["merged_bins"] = p.get("merged_bins", 0) + m1
                p["hidden_sides"] = p.get("hidden_sides", 0) + h1
                merged += m1
                hidden += h1
        if (c.get("plot") or {}).get("bins") and (c.get("plot_density") or {}).get("bins"):
            c["plot_density"]["bins"], k = reconcile(c["plot"]["bins"], c["plot_density"]["bins"],
                                                     c["cutoff"], min_cell)
            merged += k
        newly += guard_window_counts(c, min_cell)
    r, caught = scrub(r, min_cell)
    disc = r["disclosure"]
    disc.update(min_cell=min_cell, merged_bins=disc.get("merged_bins", 0) + merged,
                hidden_sides=disc.get("hidden_sides", 0) + hidden,
                rule=disc.get("rule", "").replace(f"1 to {old - 1}", f"1 to {min_cell - 1}")
                .replace(f"least {old}", f"least {min_cell}"),
                suppressed_fields=disc.get("suppressed_fields", []) + caught,
                suppressed_counts=disc.get("suppressed_counts", 0) + newly + len(caught))
    return r


def guard_window_counts(row: dict, min_cell: int) -> int:
    """Null ``n_left``/``n_right`` when a run of display bins from the cutoff differs from it by
    1 .. min_cell − 1 (the difference would be a small count of rows near the window's edge).

    Returns the number of counts nulled.  Runs of bins from the cutoff outward are the unions a
    reader can form from one figure, and ``n_left``/``n_right`` count the rows inside the
    bandwidth, so the two are compared like a total and its parts (complementary suppression).
    """
    nulled = 0
    c = row.get("cutoff", 0.0)
    for side, key in (("left", "n_left"), ("right", "n_right")):
        n = row.get(key)
        if n is None:
            continue
        for fig in ("plot", "plot_density"):
            bins = sorted((b for b in (row.get(fig) or {}).get("bins", []) if b["side"] == side),
                          key=lambda b: abs(b["x_low"] + b["x_high"] - 2 * c))
            runs = np.cumsum([b["n"] or 0 for b in bins])
            if any(is_small(abs(int(v) - int(n)), min_cell) for v in runs):
                row[key] = None
                nulled += 1
                break
    return nulled


def reconcile(ref_bins: list, bins: list, cutoff: float, min_cell: int) -> tuple[list, int]:
    """Adjust histogram bins so that no run of them differs from a run of ``ref_bins`` by a
    small count.

    Both figures' runs of bins start at the cutoff, so two runs are nested intervals with a
    shared end, and their difference is the count of rows between their outer edges.  Where that
    difference is 1 .. min_cell − 1, the offending edge of ``bins`` is removed (its two bins are
    merged; heights are re-weighted by width) or, for the outermost edge, the outermost bin is
    dropped.  Returns (bins, number of bins merged or dropped).
    """
    def dist(b):
        return abs(b["x_low"] + b["x_high"] - 2 * cutoff)
    out, changed = [], 0
    for side in ("left", "right"):
        ref = np.cumsum([b["n"] or 0 for b in sorted((b for b in ref_bins if b["side"] == side), key=dist)])
        mine = sorted((dict(b) for b in bins if b["side"] == side), key=dist)
        while mine:
            cum = np.cumsum([b["n"] for b in mine])
            bad = [k for k, v in enumerate(cum) if any(is_small(abs(int(v) - int(r)), min_cell) for r in ref)]
            if not bad:
                break
            k = bad[0]
            changed += 1
            if k == len(mine) - 1:
                mine.pop()
                continue
            a, b = mine[k], mine.pop(k + 1)
            wa, wb = a["x_high"] - a["x_low"], b["x_high"] - b["x_low"]
            a["height"] = (a["height"] * wa + b["height"] * wb) / (wa + wb)
            a["n"] += b["n"]
            a["x_low"], a["x_high"] = min(a["x_low"], b["x_low"]), max(a["x_high"], b["x_high"])
        out += mine
    return out, changed
