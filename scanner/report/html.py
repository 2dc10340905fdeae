"""Self-contained HTML report (figures embedded as base64 PNG), rendered from the results dict."""
from __future__ import annotations

import base64
import html
import io
from pathlib import Path

CAUTIONS = [
    "Each candidate is a hypothesis about how care was assigned, not proof that a rule was followed "
    "or that it caused anything.",
    "Nothing in this report is clinical advice.",
    "Person-level data need the approvals and data-use agreements that apply locally; this report "
    "holds aggregates only, and counts from 1 to {m_minus} are suppressed (minimum cell size {m}).",
]

# Colour-blind-safe pair (blue / orange from the Okabe–Ito palette), distinct in greyscale too.
LEFT, RIGHT, INK = "#0072B2", "#E69F00", "#222222"


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    import matplotlib.pyplot as plt
    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def uptake_figure(c: dict) -> str | None:
    p = c.get("plot") or {}
    if not p.get("x"):
        return None
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, ax = plt.subplots(figsize=(5.2, 3.2))
    for side, colour, marker in (("left", LEFT, "o"), ("right", RIGHT, "s")):
        xs = [x for x, s in zip(p["x"], p["side"]) if s == side]
        ys = [y for y, s in zip(p["mean"], p["side"]) if s == side]
        ax.scatter(xs, ys, s=18, color=colour, marker=marker, zorder=3,
                   label=f"{side} of cutoff (binned share)")
    for key, colour, style in (("fit_left", LEFT, "-"), ("fit_right", RIGHT, "--")):
        if p.get(key):
            (x0, y0), (x1, y1) = p[key]
            ax.plot([x0, x1], [y0, y1], color=colour, linestyle=style, linewidth=2)
    ax.axvline(c["cutoff"], color=INK, linewidth=0.8, linestyle=":")
    ax.set_xlabel(f"{c['running']} (cutoff {c['cutoff']:g})")
    ax.set_ylabel(f"share receiving {c['treatment']}")
    for s in ("top", "right"):
        ax.spines[s].set_visible(False)
    ax.legend(frameon=False, fontsize=7, loc="best")
    return _png(fig)


def _fmt(v, f):
    return "—" if v is None else format(v, f)


def render(results: dict) -> str:
    m = results["disclosure"]["min_cell"]
    esc = html.escape
    cands = results["candidates"]
    top = results["spec"].get("top", 20)
    parts = [f"<!doctype html><html lang='en'><head><meta charset='utf-8'><title>{esc(results['title'])}</title>",
             "<style>body{font-family:system-ui,sans-serif;max-width:1100px;margin:2em auto;color:#222}"
             "table{border-collapse:collapse;font-size:13px}td,th{padding:3px 8px;border-bottom:1px solid #ddd;text-align:right}"
             "td.l,th.l{text-align:left}.card{border:1px solid #ccc;border-radius:6px;padding:1em;margin:1em 0}"
             ".caution{background:#f6f6f6;border-left:4px solid #555;padding:.5em 1em}</style></head><body>",
             f"<h1>{esc(results['title'])}</h1>",
             "<section id='cautions' class='caution'><h2>Read this first</h2><ul>"]
    parts += [f"<li>{esc(t.format(m=m, m_minus=m - 1))}</li>" for t in CAUTIONS]
    parts.append("</ul></section>")
    d = results["data"]
    parts.append("<section id='overview'><h2>Overview</h2>"
                 f"<p>Rows read: {d['rows_read']:,}. Rows used: {d['rows_used']:,}. "
                 f"Candidates examined: {results['n_candidates']} ({results['n_tested']} tested; "
                 f"q-values adjust for all of them). Counts suppressed: "
                 f"{results['disclosure']['suppressed_counts']}.</p>")
    if d["dropped"]:
        parts.append("<table><tr><th class='l'>column</th><th class='l'>treatment</th><th class='l'>reason</th><th>rows</th></tr>")
        for r in d["dropped"]:
            parts.append(f"<tr><td class='l'>{esc(r['column'])}</td><td class='l'>{esc(r['treatment'] or '')}</td>"
                         f"<td class='l'>{esc(r['reason'])}</td><td>{_fmt(r['rows'], ',')}</td></tr>")
        parts.append("</table>")
    for n in results.get("notes", []):
        parts.append(f"<p>{esc(n)}</p>")
    parts.append("</section><section id='ranking'><h2>Ranked candidates</h2><table><tr>")
    heads = ["#", "running", "treatment", "cutoff", "origin", "jump", "95% CI", "F", "q",
             "n left", "n right", "density p", "balance p", "score", "verdict", "flags"]
    parts += [f"<th class='{'l' if h in ('running', 'treatment', 'origin', 'verdict', 'flags') else ''}'>{h}</th>" for h in heads]
    parts.append("</tr>")
    for c in cands[:max(top, 20)]:
        ci = "—" if c["ci_low"] is None else f"[{c['ci_low']:+.3f}, {c['ci_high']:+.3f}]"
        parts.append(
            f"<tr><td>{c['rank']}</td><td class='l'>{esc(c['running'])}</td><td class='l'>{esc(c['treatment'])}</td>"
            f"<td>{c['cutoff']:g}</td><td class='l'>{esc(c['origin'])}</td><td>{_fmt(c['jump'], '+.3f')}</td>"
            f"<td>{ci}</td><td>{_fmt(c['first_stage_f'], '.0f')}</td><td>{_fmt(c['q_value'], '.2g')}</td>"
            f"<td>{_fmt(c['n_left'], ',')}</td><td>{_fmt(c['n_right'], ',')}</td>"
            f"<td>{_fmt(c['density_p'], '.2g')}</td><td>{_fmt(c['balance_p'], '.2g')}</td>"
            f"<td>{_fmt(c['score'], '.0f')}</td><td class='l'>{esc(c['verdict'])}</td>"
            f"<td class='l'>{esc(', '.join(c['flags']))}</td></tr>")
    parts.append("</table></section><section id='candidates'><h2>Candidate cards</h2>")
    for c in cands[:top]:
        if c["verdict"] in ("no jump", "not estimable"):
            continue
        parts.append(f"<div class='card'><h3>#{c['rank']} {esc(c['running'])} × {esc(c['treatment'])} "
                     f"at {c['cutoff']:g} — {esc(c['verdict'])}</h3><ul>")
        parts += [f"<li>{esc(r)}</li>" for r in c["reasons"]]
        parts.append("</ul>")
        img = uptake_figure(c)
        if img:
            parts.append(f"<img alt='uptake around the cutoff' src='data:image/png;base64,{img}'>")
        parts.append("</div>")
    parts.append("</section></body></html>")
    return "\n".join(parts)


def write_report(results: dict, path: Path, stats=None) -> None:
    Path(path).write_text(render(results), encoding="utf-8")
