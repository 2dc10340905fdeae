"""bins.csv (disclosure-safe binned data for reuse) and results.md (a summary for a protocol).

Both are rendered from the results dict alone, so they hold only what results.json holds: every
count in them is 0 or at least the minimum cell size.
"""
from __future__ import annotations

import csv
from pathlib import Path

from ..textfmt import format_p, format_p_eq  # noqa: F401  (html and outputs import them here)

BIN_FIELDS = ("rank", "running", "treatment", "cutoff", "figure", "side", "x_low", "x_high",
              "x_mean", "n", "value", "value_kind")

CAUTION_LINES = [
    "Each candidate is a hypothesis about how care was assigned, not proof that a rule was "
    "followed or that it caused anything.",
    "Nothing here is clinical advice.",
    "Person-level data need the approvals and data-use agreements that apply locally; these "
    "outputs hold aggregates only.",
    "Counts from 1 to {m1} are suppressed (minimum cell size {m}); sparse display bins are merged "
    "with their neighbours.",
]


DENSITY_TESTS = {"local_polynomial": "local-polynomial test", "mccrary": "McCrary test",
                 "binomial_window": "binomial window test", "frandsen": "Frandsen discrete test"}


def density_label(method) -> str:
    """Which density test ``density_p`` comes from, in words (scanner.diagnostics.sorting)."""
    if not method:
        return "density test"
    base = method.removesuffix("_without_heaps")
    words = DENSITY_TESTS.get(base, base.replace("_", " "))
    return words + (", heaps removed" if method.endswith("_without_heaps") else "")


def cautions(min_cell: int) -> list[str]:
    return [t.format(m=min_cell, m1=min_cell - 1) for t in CAUTION_LINES]


def bin_rows(results: dict) -> list[dict]:
    """One row per display bin of every figure that has bins (uptake and density)."""
    out = []
    for c in results["candidates"]:
        base = {k: c.get(k) for k in ("rank", "running", "treatment", "cutoff")}
        for fig, key, value, kind in (("uptake", "plot", "mean", f"mean of {c['treatment']}"),
                                      ("density", "plot_density", "height", "density")):
            for b in (c.get(key) or {}).get("bins", []):
                out.append({**base, "figure": fig, "side": b["side"], "x_low": b["x_low"],
                            "x_high": b["x_high"], "x_mean": b.get("x"), "n": b["n"],
                            "value": b[value], "value_kind": kind})
    return out


def write_bins_csv(results: dict, path: Path) -> None:
    with Path(path).open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(BIN_FIELDS))
        w.writeheader()
        for r in bin_rows(results):
            w.writerow({k: ("" if v is None else v) for k, v in r.items()})


def jump_and_interval(c: dict, none: str = "n/a") -> str:
    """The conventional jump with the reported interval and its kind; a robust interval is
    centred on the bias-corrected jump (Calonico, Cattaneo & Titiunik 2014), so that centre is
    named beside it — otherwise the estimate can sit outside its own interval."""
    centre = (f", bias-corrected {_num(c.get('jump_bc'), '+.3f', none)}"
              if c.get("interval") == "robust" else "")
    ci = ("" if c.get("ci_low") is None else
          f"{centre} [{c['ci_low']:+.3f}, {c['ci_high']:+.3f}] {c.get('interval') or 'conventional'}")
    return f"{_num(c.get('jump'), '+.3f', none)}{ci}"


def _num(v, fmt, none="n/a"):
    return none if v is None else format(v, fmt)


def _p(v):
    return format_p(v)


def markdown(results: dict, top: int = 5) -> str:
    """A short Markdown summary of the best candidates, for pasting into a study protocol."""
    m = results["disclosure"]["min_cell"]
    d = results["data"]
    lines = [f"# {results['title']}: candidate designs", "",
             f"Screened with cutscan {results.get('cutscan_version', '')} on "
             f"{_num(d.get('rows_used'), ',', 'a suppressed number of')} rows "
             f"({results['n_candidates']} cutoffs examined, {results['n_tested']} tested; "
             "q-values are Benjamini–Hochberg adjusted over all tests).", ""]
    if results.get("warnings"):
        lines += [f"**Data warnings ({len(results['warnings'])})** — read before the table:", ""]
        lines += [f"- `{w['kind']}`: {w['message']}" for w in results["warnings"]] + [""]
    shown = [c for c in results["candidates"] if c["verdict"] not in ("no jump", "not estimable")]
    shown = shown[:top]
    if not shown:
        lines += ["No candidate showed a jump in uptake after adjusting for the number of tests.", ""]
    else:
        lines += ["| # | running variable | treatment | cutoff | origin | jump in uptake "
                  "(conventional; bias-corrected where the interval is robust) [95% CI, kind] | "
                  "rows left / right of cutoff (within bandwidth) | density p | balance p | verdict |",
                  "|---|---|---|---|---|---|---|---|---|---|"]
        for c in shown:
            origin = c.get("rule_id") or c["origin"]
            lines.append(
                f"| {c['rank']} | {c['running']} | {c['treatment']} | {c['cutoff']:g} | {origin} | "
                f"{jump_and_interval(c)} | {_num(c['n_left'], ',', 'suppressed')} / "
                f"{_num(c['n_right'], ',', 'suppressed')} | {_p(c.get('density_p'))} "
                f"({density_label(c.get('density_method'))}) | "
                f"{_p(c.get('balance_p'))} | {c['verdict']}"
                f"{' (' + ', '.join(c['flags']) + ')' if c['flags'] else ''} |")
        lines.append("")
        for c in shown:
            lines.append(f"**#{c['rank']} {c['running']} at {c['cutoff']:g} → {c['treatment']}**"
                         f" (bandwidth {_num(c.get('bandwidth'), '.4g')}, {c.get('kernel', '')} "
                         f"kernel, {c.get('design', '')} design)")
            lines += [f"- {r}" for r in c.get("reasons", [])]
            lines.append("")
    lines += ["## Cautions", ""] + [f"- {t}" for t in cautions(m)] + [""]
    return "\n".join(lines)


def write_markdown(results: dict, path: Path) -> None:
    Path(path).write_text(markdown(results), encoding="utf-8")
