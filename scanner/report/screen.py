"""The report section of a registry-wide screen: one row per measurement kind.

A screen of every measurement kind × every event code can test a thousand pairs; the ranking
lists candidates, and this section keeps the overview readable by grouping the pairs under
their measurement: how many persons had it, how many event codes it was paired with, how many
stage-1 tests were run and passed, and its best candidate.
"""
from __future__ import annotations

import html

from ..textfmt import format_p
from .disclosure import is_small


def screen_section(results: dict) -> list[str]:
    """HTML rows grouped by measurement; empty when the scan was not a screen."""
    s = (results.get("search") or {}).get("screen")
    if not s:
        return []
    m = results["disclosure"]["min_cell"]
    persons = {k["kind"]: k["n_persons"] for k in s.get("measurement_kinds", [])}
    best: dict = {}
    for c in results["candidates"]:
        best.setdefault(c["running"], c)
    groups: dict = {}
    for p in s.get("pairs", []):
        g = groups.setdefault(p["running"], {"pairs": 0, "tested": 0, "kept": 0, "min_p": None})
        g["pairs"] += 1
        g["tested"] += p["tested"]
        g["kept"] += p["kept"]
        if p["min_p"] is not None and (g["min_p"] is None or p["min_p"] < g["min_p"]):
            g["min_p"] = p["min_p"]
    n_codes = len(s.get("event_codes", []))
    parts = ["<section id='screen'><h2>Screen by measurement</h2>",
             f"<p class='muted'>{len(groups)} measurement kinds × {n_codes} event codes. Stage 1 "
             "tested the jump at every declared and round-number cutoff of every pair; the "
             "candidates below the q-value threshold over all stage-1 tests went on to the full "
             "checks. Smallest stage-1 p is before any adjustment.</p><table><tr>"
             "<th class='l'>measurement</th><th>persons</th><th>event codes</th>"
             "<th>stage-1 tests</th><th>passed</th><th>smallest p</th>"
             "<th class='l'>best candidate</th><th class='l'>verdict</th></tr>"]
    for run in sorted(groups, key=lambda r: (best[r]["rank"] if r in best else 10 ** 9, r)):
        g, b = groups[run], best.get(run)
        n = persons.get(run)
        who = "suppressed" if n is None or is_small(n, m) else f"{n:,}"
        cand = (f"{html.escape(str(b['treatment']))} at {b['cutoff']:g}" if b else "—")
        verdict = html.escape(b["verdict"]) if b else "—"
        parts.append(f"<tr><td class='l'>{html.escape(str(run))}</td><td class='n'>{who}</td>"
                     f"<td>{g['pairs']}</td><td>{g['tested']:,}</td><td>{g['kept']}</td>"
                     f"<td>{format_p(g['min_p'])}</td><td class='l'>{cand}</td>"
                     f"<td class='l'>{verdict}</td></tr>")
    parts.append("</table></section>")
    return parts
