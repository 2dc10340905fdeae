"""results.json, candidates.csv and the terminal table, rendered from one results dict.

Disclosure control: every count of rows in the outputs that lies between 1 and ``min_cell − 1``
is replaced by null and listed under ``suppressed`` (default ``min_cell`` = 11, after the US CMS
cell size suppression policy, which forbids showing counts from 1 to 10).
"""
from __future__ import annotations

import contextlib
import csv
import json
import math
import secrets
import os
import shutil
import signal
import tempfile
import threading
from pathlib import Path

import numpy as np

from ..errors import OutputError
from ..textfmt import counted
from .exports import format_p, jump_and_interval
from .disclosure import guard_window_counts, is_small, reconcile, protect_group, scrub, suppress  # noqa: F401  (suppress: API)

HELD_SIGNALS = (signal.SIGINT, signal.SIGTERM)   # held back while folders are created or moved


@contextlib.contextmanager
def held_interrupts():
    """Hold SIGINT and SIGTERM back for the block; one that arrived is raised after it.

    Masking the signals (``pthread_sigmask``) is not enough: it masks only the calling thread,
    and the kernel hands a process-wide signal to any thread that does not block it (pyarrow,
    numba and BLAS keep worker threads), after which Python runs the handler in the main thread
    at the next bytecode, possibly inside the block.  So the block runs under handlers that
    only record the signal.  Outside the main thread handlers cannot be set; the block then
    runs as it is.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught = []
    previous = {s: signal.signal(s, lambda signum, frame: caught.append(signum))
                for s in HELD_SIGNALS}
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
    if caught:
        raise KeyboardInterrupt

RESULTS_VERSION = "1.0"
COUNT_FIELDS = ("n_left", "n_right")
CSV_FIELDS = ("rank", "running", "treatment", "cutoff", "origin", "rule_id", "eligible_side",
              "jump", "se", "ci_low", "ci_high", "p_value", "q_value", "first_stage_f", "design",
              "bandwidth", "n_left", "n_right", "distinct_left", "distinct_right", "density_p",
              "balance_p", "placebo_p", "score", "verdict", "flags",
              # added after the contract fields: which interval ci_low/ci_high are, which test
              # density_p comes from, and the verdict's reasons (joined by " | ")
              "interval", "density_method", "reasons")


def clean(value):
    """JSON-safe copy: NaN/inf → None, numpy scalars → Python."""
    if isinstance(value, dict):
        return {str(k): clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [clean(v) for v in value]
    if isinstance(value, (np.floating, float)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def _protect_data(data: dict, m: int) -> tuple[dict, int]:
    """Suppress small row counts in the data accounting, with complementary suppression.

    rows_read = rows_used + repeat rows dropped, and all three are shown, so a single small
    part could be recovered by subtraction; :func:`protect_group` hides a second part then.
    """
    data = dict(data)
    dropped = [dict(d) for d in data.get("dropped", [])]
    repeat = [i for i, d in enumerate(dropped) if d.get("reason", "").startswith("repeat rows")]
    parts = [data.get("rows_used")] + [dropped[i]["rows"] for i in repeat]
    shown, total_ok = protect_group(parts, m, total_shown=True)
    n_hidden = sum(1 for a, b in zip(parts, shown) if a is not None and b is None)
    data["rows_used"] = shown[0]
    for i, v in zip(repeat, shown[1:]):
        dropped[i]["rows"] = v
    if not total_ok:
        data["rows_read"] = None
        n_hidden += 1
    for i, d in enumerate(dropped):
        if i not in repeat and is_small(d["rows"], m):
            d["rows"] = None
            n_hidden += 1
    data["dropped"] = dropped
    return data, n_hidden


def _figure_data(result, rows: list, m: int) -> None:
    """Attach disclosure-controlled display data for the report to the top candidates."""
    from .plots import density_plot, sensitivity_plot, timeline_plot, uptake_plot
    spec = result.spec
    for row in rows[:spec.top]:
        st = (result.stats or {}).get(row["running"])
        if st is None:
            continue
        row["plot"] = uptake_plot(st, row, m)
        row["plot_density"] = density_plot(st, row, m)
        if row["plot"] and row["plot_density"]:
            # the two histograms must not give away a small slice by difference
            dens = row["plot_density"]
            dens["bins"], k = reconcile(row["plot"]["bins"], dens["bins"], row["cutoff"], m)
            dens["merged_bins"] += k
        if "sensitivity" not in row:
            row["plot_sensitivity"] = sensitivity_plot(st, row)
        if spec.date and "timeline" not in row:
            row["plot_timeline"] = timeline_plot(st, row, m)


def results_dict(result) -> dict:
    """The documented results.json structure (docs/output.md), disclosure-controlled."""
    spec = result.spec
    m = spec.min_cell
    rows = []
    suppressed = 0
    for r in result.rows:
        row = dict(r)
        for f in COUNT_FIELDS:
            if is_small(row.get(f), m):
                row[f] = None
                suppressed += 1
        rows.append(row)
    _figure_data(result, rows, m)
    suppressed += sum(guard_window_counts(row, m) for row in rows)
    data, hidden = _protect_data(result.data, m)
    suppressed += hidden
    out = clean({
        "version": RESULTS_VERSION,
        "cutscan_version": _pkg_version(),
        "created": result.created,
        "title": spec.title,
        "spec": spec.to_dict(),
        "data": data,
        "n_candidates": len(rows),
        "n_tested": rows[0]["n_tested"] if rows else 0,
        "tests": test_family(rows, getattr(result, "search", None) or {}),
        "disclosure": {},
        "warnings": [dict(w) for w in getattr(result, "warnings", [])],
        "notes": list(result.notes),
        "candidates": rows,
    })
    out, caught = scrub(out, m)
    merged = sum((c.get(k) or {}).get("merged_bins", 0) for c in out["candidates"]
                 for k in ("plot", "plot_density"))
    hidden_sides = sum((c.get(k) or {}).get("hidden_sides", 0) for c in out["candidates"]
                       for k in ("plot", "plot_density"))
    out["disclosure"] = {"min_cell": m, "suppressed_counts": suppressed + len(caught),
                         "merged_bins": merged, "hidden_sides": hidden_sides,
                         "rule": f"counts from 1 to {m - 1} are suppressed (US CMS cell size "
                                 "suppression policy when min_cell = 11); display bins are merged "
                                 "with neighbours until every bin holds 0 or at least "
                                 f"{m} rows (and, for 0/1 columns, 0 or at least {m} ones and zeros)",
                         "suppressed_fields": caught}
    return out


def test_family(rows: list, search: dict) -> dict:
    """What ``n_tested`` counts (scanner.score): candidates with a finite p-value, plus each
    step of the discovery search that added no row of its own (its search-adjusted p-value),
    plus each screened pair that stage 1 set aside (its stage-1 p-value)."""
    finite = sum(1 for r in rows if r.get("p_value") is not None
                 and math.isfinite(float(r["p_value"])))
    extra = search.get("family_extra") or {}
    out = {"candidates": finite, "searches": int(extra.get("searches", 0))}
    if extra.get("screened_out"):
        out["screened_out"] = int(extra["screened_out"])
    return out


def _pkg_version():
    from .. import __version__
    return __version__


def tidy_rows(candidates: list[dict]) -> list[dict]:
    out = []
    for c in candidates:
        row = {k: c.get(k) for k in CSV_FIELDS}
        row["flags"] = ";".join(c.get("flags") or [])
        row["reasons"] = " | ".join(c.get("reasons") or [])
        out.append(row)
    return out


def write_json(results: dict, path: Path) -> None:
    path.write_text(json.dumps(results, indent=2, sort_keys=False, allow_nan=False) + "\n",
                    encoding="utf-8")


def write_csv(results: dict, path: Path) -> None:
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(CSV_FIELDS))
        w.writeheader()
        for row in tidy_rows(results["candidates"]):
            w.writerow({k: ("" if v is None else v) for k, v in row.items()})


TMP_MARK, OLD_MARK = ".tmp-", ".old-"


def check_out(out: Path, force: bool, protect=()) -> None:
    """Refuse an output folder that exists (unless ``force``) or that is not cutscan's to replace.

    With ``force`` a folder is replaced only when it is empty or holds a results.json (written by
    cutscan), is not a file, and does not hold any path in ``protect`` (the spec and the data),
    so inputs are never deleted by a mistyped --out.
    """
    out = Path(out)
    if not out.exists():
        return
    if not force:
        raise OutputError(f"{out}: output folder exists; choose another --out or add --force to "
                          "replace it.")
    if not out.is_dir():
        raise OutputError(f"{out}: is a file, not an output folder; choose another --out.")
    if any(out.iterdir()) and not (out / "results.json").exists():
        raise OutputError(f"{out}: folder was not written by cutscan (no results.json), so "
                          "--force will not replace it; choose another --out.")
    here = out.resolve()
    for p in protect:
        if p is not None and (Path(p).resolve() == here or here in Path(p).resolve().parents):
            raise OutputError(f"{out}: holds the scan's input {p}; choose another --out.")


def recover(out: Path) -> None:
    """Tidy what a killed earlier write left beside ``out``.

    A run killed with SIGKILL cannot clean up: it may leave a temporary folder, or (only between
    the two renames of the fallback swap) the previous output moved aside.  The previous output
    is put back and temporary folders are removed.
    """
    out = Path(out)
    if not out.parent.exists():
        return
    for p in out.parent.glob(f".{out.name}{OLD_MARK}*"):
        if not out.exists():
            os.replace(p, out)
        else:
            shutil.rmtree(p, ignore_errors=True)
    for p in out.parent.glob(f".{out.name}{TMP_MARK}*"):
        shutil.rmtree(p, ignore_errors=True)


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _exchange(a: Path, b: Path) -> bool:
    """Atomically swap two paths (Linux renameat2 RENAME_EXCHANGE); False where unsupported."""
    try:
        import ctypes
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    return fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0


def _swap_in(tmp: Path, out: Path) -> None:
    """Put the finished ``tmp`` folder at ``out``; the previous ``out`` is never half-replaced.

    SIGINT and SIGTERM are held back while the folders move, so an interrupt lands before or
    after the swap, never between the two renames of the fallback path.
    """
    with held_interrupts():
        if not out.exists():
            os.replace(tmp, out)
        elif _exchange(tmp, out):
            shutil.rmtree(tmp)               # tmp now holds the previous output
        else:
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}{OLD_MARK}", dir=out.parent))
            os.rmdir(old)
            os.replace(out, old)
            os.replace(tmp, out)
            shutil.rmtree(old)


def write_outputs(result, out: Path, force: bool = False, protect=()) -> Path:
    """Write results.json, candidates.csv, report.html, results.md and bins.csv into ``out``.

    Files are written into a temporary folder beside ``out``, flushed to disk, and swapped into
    place at the end (an atomic exchange where the system offers one), so an interrupted scan
    leaves no half-written output and the previous folder stays whole.  An existing ``out`` is
    replaced only with ``force`` and only when :func:`check_out` allows it.
    """
    out = Path(out)
    recover(out)
    check_out(out, force, protect)
    # The temporary folder's name is fixed before it is made, so the clean-up below removes it
    # whenever an interrupt lands, even between its creation and the next line.
    tmp = out.parent / f".{out.name}{TMP_MARK}{os.getpid()}-{secrets.token_hex(4)}"
    try:
        try:
            out.parent.mkdir(parents=True, exist_ok=True)
            tmp.mkdir(mode=0o700)
        except OSError as exc:
            raise OutputError(f"{out}: cannot create the output folder: {exc.strerror or exc}; "
                              "choose a folder you can write to.") from None
        results = result.to_dict()
        write_json(results, tmp / "results.json")
        write_csv(results, tmp / "candidates.csv")
        write_derived(results, tmp)
        for f in tmp.iterdir():
            _fsync(f)
        _swap_in(tmp, out)
        _fsync(out.parent)
    except OutputError:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise OutputError(f"{out}: cannot write the outputs: {exc.strerror or exc}; check free "
                          "space and permissions, or choose another --out.") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out


def write_derived(results: dict, folder: Path) -> None:
    """report.html, results.md and bins.csv: everything rebuilt from results.json alone."""
    from .exports import write_bins_csv, write_markdown
    from .html import write_report
    write_report(results, folder / "report.html", cache=True)
    write_markdown(results, folder / "results.md")
    write_bins_csv(results, folder / "bins.csv")


def _num(v, fmt):
    return "—" if v is None else format(v, fmt)


def terminal_table(results: dict, top: int = 20, width: int = 200):
    """A rich Table of the best candidates; below 130 columns a compact layout (no interval)."""
    if width < 130:
        return _compact_table(results, top)
    from rich.table import Table
    grid = results.get("n_grid_points") or 0
    scanned = f" (search: {grid} grid cutoffs examined)" if grid else ""
    t = Table(title=f"{results['title']} — {results['n_candidates']} candidates, "
                    f"{results['n_tested']} tests{_family(results)}{scanned}, best "
                    f"{min(top, results['n_candidates'])} shown",
              header_style="bold", show_lines=False)
    for col, just in (("#", "right"), ("running", "left"), ("treatment", "left"),
                      ("cutoff", "right"), ("origin", "left"), ("jump", "right"),
                      ("bias-corr. [95% CI]", "right"),
                      ("F", "right"), ("q", "right"), ("score", "right"), ("verdict", "left"),
                      ("flags", "left")):
        t.add_column(col, justify=just, overflow="fold")
    for c in results["candidates"][:top]:
        ci = ("" if c["ci_low"] is None else f" [{c['ci_low']:+.2f}, {c['ci_high']:+.2f}]")
        f = c["first_stage_f"]
        # The robust CI's centre, or the name of the interval when it is not the robust one.
        bc = (_num(c.get("jump_bc"), "+.3f") if c.get("interval") == "robust"
              else str(c.get("interval") or "—"))
        t.add_row(str(c["rank"]), c["running"], c["treatment"], f"{c['cutoff']:g}",
                  c.get("rule_id") or c["origin"], _num(c["jump"], "+.3f"), bc + ci,
                  "—" if f is None else (">9999" if f > 9999 else f"{f:.0f}"),
                  format_p(c["q_value"], "—"), _num(c["score"], ".0f"),
                  f"[{STYLE.get(c['verdict'], '')}]{c['verdict']}[/]", " ".join(c["flags"]))
    return t


def plain_lines(results: dict, top: int = 20) -> str:
    """The table for a pipe or a file: a title line, then one line per candidate.

    Each line holds rank, candidate, jump with its reported interval (and the interval's kind),
    F, q, score, verdict and flags, so ``grep`` and ``cut`` work on it and nothing wraps.
    """
    n = results["n_candidates"]
    lines = [f"{results['title']}: {n} candidates, {results['n_tested']} tests in the q-value "
             f"family{_family(results)}, best {min(top, n)} shown"]
    for c in results["candidates"][:top]:
        f = c.get("first_stage_f")
        fs = "—" if f is None else (">9999" if f > 9999 else f"{f:.0f}")
        flags = " ".join(c.get("flags") or []) or "-"
        lines.append(f"{c['rank']:>3}  {c['running']} → {c['treatment']} at {c['cutoff']:g} "
                     f"({c.get('rule_id') or c['origin']})  jump {jump_and_interval(c, '—')}  "
                     f"F {fs}  q {format_p(c['q_value'], '—')}  score {_num(c['score'], '.0f')}  "
                     f"{c['verdict']}  flags: {flags}")
    return "\n".join(lines)


def _family(results: dict) -> str:
    t = results.get("tests") or {}
    if not (t.get("searches") or t.get("screened_out")):
        return ""
    screened = (f" + {counted(t['screened_out'], 'screened-out test')}"
                if t.get("screened_out") else "")
    return (f" ({counted(t['candidates'], 'candidate')} with a p-value + "
            f"{counted(t['searches'], 'search step')}{screened})")


STYLE = {"usable": "bold green", "caution": "yellow", "doubtful": "magenta",
         "inconclusive": "cyan", "no jump": "dim",
         "not estimable": "dim red"}


def _compact_table(results: dict, top: int):
    """Narrow terminals: one text column for the candidate, the interval left to the outputs."""
    from rich.table import Table
    t = Table(title=f"{results['title']}: {results['n_candidates']} candidates, "
                    f"{results['n_tested']} tests{_family(results)} (intervals in candidates.csv)",
              header_style="bold")
    for col, just in (("#", "right"), ("candidate", "left"), ("jump", "right"), ("q", "right"),
                      ("score", "right"), ("verdict", "left"), ("flags", "left")):
        t.add_column(col, justify=just, overflow="fold")
    for c in results["candidates"][:top]:
        what = f"{c['running']} → {c['treatment']} at {c['cutoff']:g} ({c.get('rule_id') or c['origin']})"
        t.add_row(str(c["rank"]), what, _num(c["jump"], "+.3f"), format_p(c["q_value"], "—"),
                  _num(c["score"], ".0f"), f"[{STYLE.get(c['verdict'], '')}]{c['verdict']}[/]",
                  " ".join(c["flags"]))
    return t
