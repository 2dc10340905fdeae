"""Self-contained HTML report (figures embedded as base64 PNG), rendered from the results dict.

The report needs results.json only (``cutscan report DIR`` rebuilds it); it loads nothing from
the network.  Sections that depend on optional fields (intervals, sensitivity, density tests,
placebo, compliance shares, power, timeline) appear only when those fields are present.
"""
from __future__ import annotations

import hashlib
import json

import html
from pathlib import Path

from ..headline import PRACTICAL_JUMP
from ..textfmt import counted
from . import figures
from .exports import cautions, density_label, format_p, format_p_eq
from .screen import screen_section

esc = html.escape
CARD_VERDICTS = ("usable", "caution", "doubtful")
MAX_CARDS = 10    # cards for the best 10 candidates with a jump; the ranked table lists more

CSS = """
body{font:14px/1.45 system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1240px;margin:1.5em auto;
color:#222;padding:0 1em}
h1{font-size:1.6em;margin:.2em 0}h2{font-size:1.2em;border-bottom:2px solid #1d4e89;padding-bottom:.15em;
margin-top:1.6em}h3{font-size:1.05em;margin:.1em 0 .5em}h4{font-size:.92em;margin:.8em 0 .2em;color:#444}
table{border-collapse:collapse;font-size:12.5px}td,th{padding:3px 5px;border-bottom:1px solid #ddd;
text-align:right;vertical-align:top;white-space:nowrap}th{background:#f3f3f3}.l{text-align:left;white-space:normal}
.caution{border-left:5px solid #1d4e89;background:#f4f6f9;padding:.4em 1em;margin:1em 0}
.card{border:1px solid #bbb;padding:.8em 1em;margin:1.2em 0;page-break-inside:avoid}
.grid{display:grid;grid-template-columns:1fr 1fr;gap:.4em 1.2em}.grid figure{margin:0}
figcaption{font-size:12px;color:#444}.tag{display:inline-block;padding:0 .45em;border:1px solid #555;
font-size:12px;margin-right:.3em}.v-usable{font-weight:700}.v-doubtful{font-style:italic}
.bar{display:flex;height:16px;border:1px solid #555;max-width:420px}.bar span{display:block}
.muted{color:#555;font-size:12.5px}.ci{color:#555;font-size:11px}
.wide{overflow-x:auto;max-width:100%}.wrap{display:inline-block;white-space:normal;max-width:11em}
"""


def _fmt(v, f, none="—"):
    return none if v is None else format(v, f)


def _p(v):
    return format_p(v, "—")


def _p_eq(name: str, v) -> str:
    return format_p_eq(name, v, "—")


def _img(png: str | None, alt: str, caption: str) -> str:
    if not png:
        return ""
    return (f"<figure><img alt='{esc(alt)}' src='data:image/png;base64,{png}'>"
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def _draw(call, alt, caption):
    """A figure as an <img>: ``call`` is (figure function, its arguments...).

    Drawing is the slow part of a report (about 0.3 s a figure), so each PNG is kept in the
    output folder's figure cache under a hash of the function, its inputs and the figure code;
    ``cutscan report`` redraws only figures whose inputs changed (e.g. after --min-cell).
    """
    png = FIGURE_CACHE.get(call)
    return _img(png, alt, caption) if png else ""


class FigureCache:
    """PNG (base64) per figure input, kept in ``folder`` (None: no cache, always draw).

    The figure module (and matplotlib, a second of imports) is loaded only when a figure has
    to be drawn, so a rebuild whose figures are all cached never imports it.
    """

    def __init__(self):
        self.folder, self.used = None, set()
        code = (Path(__file__).parent / "figures.py").read_bytes()
        self.code = hashlib.sha256(code).hexdigest()[:16]

    def key(self, call) -> str:
        fn, *args = call
        blob = json.dumps([fn, args], sort_keys=True, default=str)
        return hashlib.sha256((self.code + blob).encode()).hexdigest()[:32]

    def get(self, call) -> str:
        key = self.key(call)
        path = self.folder / f"{key}.b64" if self.folder else None
        self.used.add(key)
        if path is not None and path.exists():
            return path.read_text(encoding="ascii")
        from . import figures
        fn, *args = call
        fig = getattr(figures, fn)(*args)
        png = figures.to_png(fig) if fig is not None else ""
        if path is not None:
            path.write_text(png, encoding="ascii")
        return png

    def start(self, folder) -> None:
        self.folder, self.used = folder, set()
        if folder is not None:
            folder.mkdir(exist_ok=True)

    def prune(self) -> None:
        """Forget figures this report no longer shows."""
        if self.folder is not None:
            for p in self.folder.glob("*.b64"):
                if p.stem not in self.used:
                    p.unlink()


FIGURE_CACHE = FigureCache()
FIGURE_DIR = ".figures"


def _units(results: dict) -> dict:
    return {r["column"]: r.get("unit") for r in results["spec"].get("running", [])}


def _overview(results: dict) -> list[str]:
    d, disc = results["data"], results["disclosure"]
    spec = results["spec"]
    run = ", ".join(r["column"] for r in spec.get("running", []))
    parts = ["<section id='overview'><h2>Overview</h2><table>",
             f"<tr><th class='l'>rows read</th><td class='n'>{_fmt(d.get('rows_read'), ',', 'suppressed')}</td></tr>",
             f"<tr><th class='l'>rows used</th><td class='n'>{_fmt(d.get('rows_used'), ',', 'suppressed')}</td></tr>",
             f"<tr><th class='l'>running variables</th><td class='l'>{esc(run)}</td></tr>",
             f"<tr><th class='l'>treatments</th><td class='l'>{esc(', '.join(spec.get('treatments', [])))}</td></tr>",
             f"<tr><th class='l'>covariates</th><td class='l'>{esc(', '.join(spec.get('covariates', [])) or 'none')}</td></tr>",
             f"<tr><th class='l'>date column</th><td class='l'>{esc(spec.get('date') or 'none')}</td></tr>",
             f"<tr><th class='l'>cutoffs examined</th><td>{results['n_candidates']:,} "
             f"({results['n_tested']:,} tests in the q-value family: "
             f"{counted((results.get('tests') or {}).get('candidates', results['n_tested']), 'candidate')} "
             f"with a p-value, {counted((results.get('tests') or {}).get('searches', 0), 'search step')} "
             "that added no candidate"
             f"{_screened((results.get('tests') or {}).get('screened_out', 0))})</td></tr>",
             f"<tr><th class='l'>estimator</th><td class='l'>local polynomial of degree "
             f"{spec.get('degree', 1)}, {esc(str(spec.get('kernel', '')))} kernel, bandwidth "
             f"{esc(str(spec.get('bandwidth', '')))}</td></tr></table>"]
    if d.get("dropped"):
        parts.append("<h4>Rows left out</h4><table><tr><th class='l'>column</th>"
                     "<th class='l'>treatment</th><th class='l'>reason</th><th>rows</th></tr>")
        for r in d["dropped"]:
            parts.append(f"<tr><td class='l'>{esc(str(r['column']))}</td><td class='l'>"
                         f"{esc(r.get('treatment') or '')}</td><td class='l'>{esc(r['reason'])}</td>"
                         f"<td class='n'>{_fmt(r['rows'], ',', 'suppressed')}</td></tr>")
        parts.append("</table>")
    for n in results.get("notes", []):
        parts.append(f"<p class='muted'>{esc(n)}</p>")
    parts.append(f"<h4>Disclosure control</h4><p id='suppression'>Minimum cell size {disc['min_cell']}: "
                 f"{esc(disc.get('rule', ''))}. In this report {disc.get('suppressed_counts', 0)} "
                 f"count(s) were suppressed, {disc.get('merged_bins', 0)} display bin(s) were merged "
                 f"into a neighbour and {disc.get('hidden_sides', 0)} figure side(s) were hidden "
                 "because they could not be made safe.</p></section>")
    return parts


# The verdict and its flags sit next to the candidate they judge, so they stay in view when a narrow window
# scrolls the table sideways.
RANK_HEADS = (("#", ""), ("running", "l"), ("treatment", "l"), ("cutoff", ""), ("origin", "l"),
              ("verdict", "l"), ("flags", "l"), ("jump (conventional)", ""),
              ("bias-corrected [95% CI]", ""), ("F", ""), ("q", ""), ("rows left", ""), ("rows right", ""),
              ("density p", ""), ("balance p", ""), ("score", ""))


def _ranking(results: dict, limit: int) -> list[str]:
    parts = ["<section id='ranking'><h2>Ranked candidates</h2>",
             f"<p class='muted'>Best {min(limit, results['n_candidates'])} of "
             f"{results['n_candidates']}; rows left/right count the rows within the bandwidth "
             "('suppressed' where the count, or its difference from a figure's bins, would be "
             f"below {results['disclosure']['min_cell']}, so one side can be hidden while the "
             "other shows thousands). "
             "The robust 95% interval is centred on the bias-corrected jump, shown beside the "
             "conventional estimate; 'inconclusive' marks an interval that holds both zero and "
             f"a jump of ±{PRACTICAL_JUMP:g} or more. "
             "The full list is in candidates.csv.</p><div class='wide'><table><tr>"]
    parts += [f"<th class='{c}'>{h}</th>" for h, c in RANK_HEADS]
    parts.append("</tr>")
    for c in results["candidates"][:limit]:
        ci = ("" if c["ci_low"] is None else
              f"<br><span class='ci'>[{c['ci_low']:+.3f}, {c['ci_high']:+.3f}] "
              f"{esc(c.get('interval') or '')}</span>")
        # The robust interval is centred on the bias-corrected jump: show it beside the
        # conventional one, with the interval under it (other intervals sit under the jump).
        robust = c.get("interval") == "robust"
        bc = _fmt(c.get("jump_bc"), "+.3f") if robust else "—"   # interval named under the jump
        f = c.get("first_stage_f")
        parts.append(
            f"<tr><td>{c['rank']}</td><td class='l'>{esc(c['running'])}</td>"
            f"<td class='l'>{esc(c['treatment'])}</td><td>{c['cutoff']:g}</td>"
            f"<td class='l'>{esc(c.get('rule_id') or c['origin'])}</td>"
            f"<td class='l v-{c['verdict'].replace(' ', '-')}'>{esc(c['verdict'])}</td>"
            f"<td class='l'>{esc(', '.join(c.get('flags') or []))}</td>"
            f"<td>{_fmt(c['jump'], '+.3f')}{'' if robust else ci}</td>"
            f"<td>{bc}{ci if robust else ''}</td>"
            f"<td>{'—' if f is None else ('>9999' if f > 9999 else f'{f:.0f}')}</td>"
            f"<td>{_p(c.get('q_value'))}</td><td class='n'>{_fmt(c['n_left'], ',', 'suppressed')}"
            f"</td><td class='n'>{_fmt(c['n_right'], ',', 'suppressed')}</td><td>{_p(c.get('density_p'))}"
            f"<br><span class='ci wrap'>{esc(density_label(c.get('density_method')))}</span></td>"
            f"<td>{_p(c.get('balance_p'))}</td><td>{_fmt(c.get('score'), '.0f')}</td></tr>")
    parts.append("</table></div></section>")
    return parts


def _intervals(c: dict) -> list[tuple[str, float, float]]:
    """Every interval stored on a candidate: ``X_low/X_high`` or ``ci_low_X/ci_high_X`` pairs,
    or a dict of ``name → [low, high]`` under ``intervals``."""
    out = []
    for k, v in c.items():
        if not isinstance(v, (int, float)) or "low" not in k or k.startswith("std_"):
            continue
        hk = k.replace("low", "high")
        if hk in c and isinstance(c[hk], (int, float)):
            name = k.replace("ci_low", "").replace("_low", "").strip("_")
            if not name:        # ci_low/ci_high: the interval the verdict uses, named by its kind
                name = f"reported ({c.get('interval') or 'conventional'})"
            out.append((name.replace("_", " "), v, c[hk]))
    iv = c.get("intervals")
    if isinstance(iv, dict):
        for name, v in iv.items():
            if isinstance(v, (list, tuple)) and len(v) == 2:
                out.append((str(name), v[0], v[1]))
            elif isinstance(v, dict) and ("low" in v or "ci_low" in v):
                out.append((str(name), v.get("low", v.get("ci_low")), v.get("high", v.get("ci_high"))))
    return [(n, lo, hi) for n, lo, hi in out if lo is not None and hi is not None]


def _cell(v) -> str:
    """A table cell: floats to 4 significant digits, a missing value as a dash."""
    return "—" if v is None else (_fmt(v, ".4g") if isinstance(v, float) else str(v))


def _scalar_table(title: str, d: dict, ident: str) -> str:
    rows = [(k, v) for k, v in d.items() if isinstance(v, (int, float, str, bool)) or v is None]
    if not rows:
        return ""
    body = "".join(f"<tr><th class='l'>{esc(str(k).replace('_', ' '))}</th><td class='l'>"
                   f"{esc(_cell(v))}</td></tr>"
                   for k, v in rows)
    return f"<div class='{ident}'><h4>{esc(title)}</h4><table>{body}</table></div>"


def _list_table(title: str, items, ident: str) -> str:
    if isinstance(items, dict):
        items = [dict(name=k, **v) if isinstance(v, dict) else {"name": k, "value": v}
                 for k, v in items.items()]
    items = [i for i in items or [] if isinstance(i, dict)]
    if not items:
        return ""
    keys = [k for k in dict.fromkeys(k for i in items for k in i)
            if all(isinstance(i.get(k), (int, float, str, bool, type(None))) for i in items)]
    head = "".join(f"<th class='l'>{esc(k.replace('_', ' '))}</th>" for k in keys)
    body = "".join("<tr>" + "".join(f"<td class='l'>{esc(_cell(i.get(k)))}</td>" for k in keys)
                   + "</tr>" for i in items)
    return f"<div class='{ident}'><h4>{esc(title)}</h4><table><tr>{head}</tr>{body}</table></div>"


def _compliance(c: dict) -> str:
    keys = ("share_always", "share_compliers", "share_never")
    if not all(isinstance(c.get(k), (int, float)) for k in keys):
        return ""
    tone = {"share_always": "#1d4e89", "share_compliers": "#e0a030", "share_never": "#d9d9d9"}
    total = sum(max(c[k], 0) for k in keys) or 1
    spans = "".join(f"<span title='{k[6:]}' style='width:{100 * max(c[k], 0) / total:.1f}%;"
                    f"background:{tone[k]}'></span>" for k in keys)
    text = ", ".join(f"{k[6:]} {100 * c[k]:.0f}%" for k in keys)
    return (f"<div class='compliance'><h4>Compliance shares near the cutoff</h4><div class='bar'>"
            f"{spans}</div><p class='muted'>{esc(text)} (always-takers, compliers, never-takers "
            "among people at the cutoff, from the fitted uptake on each side).</p></div>")


def _sensitivity_points(c: dict) -> list:
    s = c.get("sensitivity")
    if isinstance(s, dict):
        s = next((v for v in s.values() if isinstance(v, list)), [])
    if not isinstance(s, list) or not s:
        s = c.get("plot_sensitivity") or []
    pts = []
    for q in s:
        if isinstance(q, dict):
            pts.append({"bandwidth": q.get("bandwidth", q.get("h")),
                        "jump": q.get("jump", q.get("estimate")),
                        "ci_low": q.get("ci_low"), "ci_high": q.get("ci_high")})
    return pts


def _timeline_points(c: dict) -> list:
    t = c.get("timeline")
    if isinstance(t, dict):
        t = next((v for v in t.values() if isinstance(v, list)), [])
    src = t if isinstance(t, list) and t else (c.get("plot_timeline") or [])
    pts = []
    for q in src:
        if isinstance(q, dict):
            label = next((q[k] for k in ("label", "period", "year", "start") if q.get(k) is not None), "?")
            pts.append({"label": label, "jump": q.get("jump"), "ci_low": q.get("ci_low"),
                        "ci_high": q.get("ci_high")})
    return pts


def card(c: dict, unit: str | None) -> str:
    """One candidate's card: verdict, reasons, figures and whatever diagnostics are present."""
    parts = [f"<div class='card' id='card-{c['rank']}'><h3>#{c['rank']} {esc(c['running'])} "
             f"at {c['cutoff']:g} → {esc(c['treatment'])} <span class='tag'>{esc(c['verdict'])}</span>"
             + "".join(f"<span class='tag'>{esc(f)}</span>" for f in c.get("flags") or []) + "</h3>"]
    if c.get("rule_description"):
        parts.append(f"<p class='muted'>Rule {esc(c.get('rule_id') or '')}: {esc(c['rule_description'])}</p>")
    parts.append("<h4>Why this verdict</h4><ul class='reasons'>"
                 + "".join(f"<li>{esc(r)}</li>" for r in c.get("reasons", [])) + "</ul>")
    ivs = _intervals(c)
    if ivs:
        parts.append("<div class='intervals'><h4>Jump in uptake: intervals</h4><table>"
                     + "".join(f"<tr><th class='l'>{esc(n)}</th><td>[{lo:+.3f}, {hi:+.3f}]</td></tr>"
                               for n, lo, hi in ivs) + "</table></div>")
    parts.append("<div class='grid'>")
    parts.append(_draw(("uptake_figure", c, unit), "uptake around the cutoff",
                       "Uptake: binned shares (IMSE-optimal evenly spaced bins) and the local fits "
                       f"within the bandwidth {_fmt(c.get('bandwidth'), '.4g')} with 95% bands."))
    parts.append(_draw(("density_figure", c, unit), "density around the cutoff",
                       f"Density of {c['running']}: histogram and fitted one-sided densities "
                       f"({_p_eq(density_label(c.get('density_method')) + ' p', c.get('density_p'))})."))
    parts.append(_draw(("balance_figure", c), "covariate balance",
                       f"Covariate balance: standardised jumps ({_p_eq('joint p', c.get('balance_p'))})."))
    parts.append(_draw(("sensitivity_figure", c, _sensitivity_points(c), unit),
                       "bandwidth sensitivity", "Bandwidth sensitivity: the jump re-estimated at "
                       "other bandwidths."))
    parts.append(_draw(("timeline_figure", c, _timeline_points(c)), "timeline of the jump",
                       "Timeline: the jump estimated period by period."))
    parts.append("</div>")
    parts.append(_compliance(c))
    if c.get("density_tests"):
        parts.append(_list_table("Density tests", c["density_tests"], "density-tests"))
    if c.get("placebo_p") is not None:
        parts.append(f"<p class='placebo'>Placebo cutoffs: {_p_eq('p', c['placebo_p'])} — the "
                     "share of placebo cutoffs (nearby points where no rule applies) whose jump is "
                     "at least as clear as this one. A small p means the real jump is unusual "
                     "among the placebo jumps; a large p means jumps this clear are common "
                     "here even without a rule.</p>")
    if isinstance(c.get("power"), dict):
        parts.append(_scalar_table("Power for the planned outcome", c["power"], "power"))
    elif isinstance(c.get("power"), list):
        parts.append(_list_table("Power for the planned outcomes", c["power"], "power"))
    elif isinstance(c.get("power"), (int, float)):
        parts.append(f"<p class='power'>Power for the planned outcome: {c['power']:.2f}</p>")
    if c.get("in_force") and isinstance(c.get("jump_pooled"), (int, float)):
        parts.append(f"<p class='period-jump'>Headline jump from the periods the rule was in "
                     f"force ({esc(c['in_force'])}): {c['jump']:+.3f}; pooled over all periods: "
                     f"{c['jump_pooled']:+.3f}.</p>")
    for key, title in (("jump_before", "before the rule"), ("jump_after", "after the rule")):
        if isinstance(c.get(key), (int, float)):
            parts.append(f"<p class='period-jump'>Jump {title}: {c[key]:+.3f}</p>")
    parts.append("</div>")
    return "".join(parts)


def warnings_block(results: dict) -> list[str]:
    """The data-quality warnings, at the top of the report (before the overview and ranking)."""
    ws = results.get("warnings") or []
    if not ws:
        return []
    parts = [f"<section id='warnings' class='caution'><h2>Data warnings ({len(ws)})</h2>"
             "<p class='muted'>What cutscan found in the data, what it did and the spec key that "
             "fixes it. Read these before the ranking: each one can change it.</p><ul>"]
    parts += [f"<li><b>{esc(w['kind'])}</b>"
              + (f" <code>{esc(str(w['column']))}</code>" if w.get("column") else "")
              + f": {esc(w['message'])}</li>" for w in ws]
    parts.append("</ul></section>")
    return parts


def render(results: dict) -> str:
    """The whole report as one HTML string."""
    m = results["disclosure"]["min_cell"]
    top = int(results["spec"].get("top", 20))
    units = _units(results)
    parts = ["<!doctype html><html lang='en'><head><meta charset='utf-8'>"
             f"<title>{esc(results['title'])}</title><style>{CSS}</style></head><body>",
             f"<h1>{esc(results['title'])}</h1><p class='muted'>cutscan "
             f"{esc(str(results.get('cutscan_version', '')))}, results version "
             f"{esc(str(results.get('version', '')))}, created {esc(str(results.get('created', '')))}</p>",
             "<section id='cautions' class='caution'><h2>Read this first</h2><ul>"]
    parts += [f"<li>{esc(t)}</li>" for t in cautions(m)]
    parts.append("</ul></section>")
    parts += warnings_block(results)
    parts += _overview(results)
    parts += screen_section(results)
    parts += _ranking(results, max(top, 20))
    parts.append("<section id='candidates'><h2>Candidate cards</h2>")
    cards = [c for c in results["candidates"][:top] if c["verdict"] in CARD_VERDICTS][:MAX_CARDS]
    if not cards:
        parts.append("<p>No candidate showed a clear jump in uptake.</p>")
    parts += [card(c, units.get(c["running"])) for c in cards]
    parts.append("</section></body></html>")
    return "\n".join(parts)


def write_report(results: dict, path: Path, stats=None, cache: bool = False) -> None:
    """Write report.html (``stats`` is unused: everything comes from the results dict).

    With ``cache`` the figures are kept in ``.figures/`` beside the report (see :func:`_draw`).
    """
    path = Path(path)
    FIGURE_CACHE.start(path.parent / FIGURE_DIR if cache else None)
    try:
        path.write_text(render(results), encoding="utf-8")
        FIGURE_CACHE.prune()
    finally:
        FIGURE_CACHE.start(None)


def _screened(n: int) -> str:
    return f" and {n:,} screened pairs set aside by stage 1" if n else ""
