"""Matplotlib figures of the report, drawn from a candidate's display data in results.json.

House style (our own): two side colours that differ in hue for colour-blind readers and in
lightness for greyscale prints — a deep blue for the left of the cutoff and an amber for the
right — backed by different markers (filled circle / open square) and line styles (solid /
dashed) so no reading depends on colour.  Thin left and bottom axes only, no grid, no titles
inside the image (the card says what the figure is), axis labels with units, the cutoff as a
thin dotted line.

Each ``*_figure`` returns a matplotlib Figure whose artists carry ``gid`` labels (for example
``bins-left``, ``line-right``) so tests can read back exactly what was drawn.
"""
from __future__ import annotations

import base64
import io

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

LEFT = "#1d4e89"      # deep blue, dark in greyscale
RIGHT = "#e0a030"     # amber, light in greyscale
INK = "#2b2b2b"
MUTED = "#8a8a8a"
FILL = "#d9d9d9"
SIDE = {"left": dict(color=LEFT, marker="o", ls="-", face=LEFT),
        "right": dict(color=RIGHT, marker="s", ls="--", face="white")}
SIZE = (5.4, 3.0)
DPI = 96


def _axes(figsize=SIZE):
    fig, ax = plt.subplots(figsize=figsize, dpi=DPI, layout="constrained")
    for s in ("top", "right"):
        ax.spines[s].set_visible(False)
    for s in ("left", "bottom"):
        ax.spines[s].set_linewidth(0.8)
        ax.spines[s].set_color(INK)
    ax.tick_params(labelsize=8, colors=INK, width=0.8)
    return fig, ax


def _cutoff(ax, c):
    ax.axvline(c, color=INK, lw=0.9, ls=":", zorder=1, gid="cutoff")
    ax.annotate(f"cutoff {c:g}", xy=(c, 1), xycoords=("data", "axes fraction"), xytext=(3, -2),
                textcoords="offset points", fontsize=7, color=INK, va="top")


def running_label(c: dict, unit: str | None) -> str:
    return f"{c['running']} ({unit})" if unit else f"{c['running']} (as recorded)"


def to_png(fig) -> str:
    """Base64 PNG of a figure (the figure is closed)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def uptake_figure(c: dict, unit: str | None = None):
    """Binned treatment shares (points) and the local fits with 95% bands on each side."""
    p = c.get("plot") or {}
    if not p.get("bins"):
        return None
    fig, ax = _axes()
    for side in ("left", "right"):
        st = SIDE[side]
        bins = [b for b in p["bins"] if b["side"] == side]
        if bins:
            ax.scatter([b["x"] for b in bins], [b["mean"] for b in bins], s=16, marker=st["marker"],
                       facecolors=st["face"], edgecolors=st["color"], linewidths=1.0, zorder=3,
                       gid=f"bins-{side}", label=f"{side} of cutoff: binned share")
        ln = p.get(f"line_{side}")
        if ln:
            ax.fill_between(ln["x"], ln["low"], ln["high"], color=st["color"], alpha=0.18, lw=0,
                            gid=f"band-{side}")
            ax.plot(ln["x"], ln["y"], color=st["color"], ls=st["ls"], lw=1.8, gid=f"line-{side}",
                    label=f"{side}: local fit, 95% band")
    _cutoff(ax, c["cutoff"])
    ax.set_xlabel(running_label(c, unit), fontsize=8)
    ax.set_ylabel(f"share with {c['treatment']}\n(0 = none, 1 = all)" if p.get("binary", True)
                  else f"mean of {c['treatment']}", fontsize=8)
    ax.legend(frameon=False, fontsize=6.5, loc="best")
    return fig


def density_figure(c: dict, unit: str | None = None):
    """Histogram of the running variable near the cutoff and the fitted one-sided densities."""
    p = c.get("plot_density") or {}
    if not p.get("bins"):
        return None
    fig, ax = _axes()
    for side in ("left", "right"):
        bins = [b for b in p["bins"] if b["side"] == side]
        if bins:
            ax.bar([b["x_low"] for b in bins], [b["height"] for b in bins],
                   width=[b["x_high"] - b["x_low"] for b in bins], align="edge", color=FILL,
                   edgecolor="white", lw=0.4, zorder=1, gid=f"hist-{side}")
        cv = p.get(f"curve_{side}")
        if cv:
            st = SIDE[side]
            ax.plot(cv["x"], cv["y"], color=st["color"], ls=st["ls"], lw=1.8, zorder=3,
                    gid=f"density-{side}", label=f"{side}: fitted density")
    _cutoff(ax, c["cutoff"])
    ax.set_xlabel(running_label(c, unit), fontsize=8)
    ax.set_ylabel(f"density (share of rows\nper {unit or 'unit'} of {c['running']})", fontsize=8)
    ax.legend(frameon=False, fontsize=6.5, loc="best")
    return fig


def balance_figure(c: dict):
    """Standardised covariate jumps at the cutoff with 95% intervals (sd units)."""
    rows = [b for b in (c.get("balance") or []) if b.get("std_jump") is not None]
    if not rows:
        return None
    fig, ax = _axes((5.4, 0.55 + 0.38 * len(rows)))
    ys = list(range(len(rows)))[::-1]
    for y, b in zip(ys, rows):
        lo, hi = b.get("std_ci_low"), b.get("std_ci_high")
        if lo is not None and hi is not None:
            ax.plot([lo, hi], [y, y], color=LEFT, lw=1.6, gid=f"interval-{b['name']}")
    ax.scatter([b["std_jump"] for b in rows], ys, s=22, color=LEFT, zorder=3, gid="std-jumps")
    ax.axvline(0, color=INK, lw=0.8, gid="zero")
    ax.set_yticks(ys, [b["name"] for b in rows], fontsize=8)
    ax.set_ylim(-0.7, len(rows) - 0.3)
    ax.set_xlabel("jump at the cutoff (standard deviations of the covariate), 95% interval",
                  fontsize=8)
    return fig


def sensitivity_figure(c: dict, points: list, unit: str | None = None):
    """The jump and its 95% interval over a range of bandwidths; the chosen one filled."""
    pts = [q for q in points if q.get("jump") is not None and q.get("bandwidth") is not None]
    if len(pts) < 2:
        return None
    fig, ax = _axes((5.4, 2.6))
    h0 = c.get("bandwidth")
    for q in pts:
        if q.get("ci_low") is not None and q.get("ci_high") is not None:
            ax.plot([q["bandwidth"]] * 2, [q["ci_low"], q["ci_high"]], color=LEFT, lw=1.4)
    chosen = [abs(q["bandwidth"] - h0) < 1e-9 * max(1, abs(h0)) if h0 else False for q in pts]
    ax.scatter([q["bandwidth"] for q in pts], [q["jump"] for q in pts], s=24, zorder=3,
               facecolors=[LEFT if ch else "white" for ch in chosen], edgecolors=LEFT,
               gid="sensitivity")
    ax.axhline(0, color=MUTED, lw=0.8)
    ax.set_xlabel(f"bandwidth ({unit or 'units of ' + c['running']}); filled = chosen", fontsize=8)
    ax.set_ylabel("jump in uptake\n(95% interval)", fontsize=8)
    return fig


def timeline_figure(c: dict, points: list):
    """The jump estimated period by period, with 95% intervals."""
    pts = [q for q in points if q.get("jump") is not None]
    if len(pts) < 2:
        return None
    fig, ax = _axes((5.4, 2.6))
    xs = list(range(len(pts)))
    for x, q in zip(xs, pts):
        if q.get("ci_low") is not None and q.get("ci_high") is not None:
            ax.plot([x, x], [q["ci_low"], q["ci_high"]], color=LEFT, lw=1.4)
    ax.plot(xs, [q["jump"] for q in pts], color=LEFT, lw=1.0, marker="o", ms=4, gid="timeline")
    ax.axhline(0, color=MUTED, lw=0.8)
    ax.set_xticks(xs, [str(q.get("label")) for q in pts], fontsize=8)
    ax.set_xlabel("period (calendar)", fontsize=8)
    ax.set_ylabel("jump in uptake\n(95% interval)", fontsize=8)
    return fig
