"""The ``cutscan`` command.

One error boundary: a :class:`~scanner.errors.ScanError` prints its message to stderr and exits
with code 2; anything else is an internal failure (exit 1, traceback only with ``--debug``).
"""
from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
from pathlib import Path

from .errors import InputError, ScanError

CAUTION = ("Candidates are hypotheses about how care was assigned, not proof; nothing here is "
           "clinical advice. Person-level data need local approvals and data-use agreements.")


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="cutscan", description="Screen an administrative table for "
                                "regression-discontinuity natural experiments.")
    p.add_argument("--debug", action="store_true", help="show tracebacks of errors")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    s = sub.add_parser("scan", help="scan a table described by a spec and rank candidate cutoffs")
    s.add_argument("spec", help="scan spec (TOML)")
    s.add_argument("--out", default="cutscan-out", help="output folder (default: cutscan-out)")
    s.add_argument("--force", action="store_true", help="replace an existing output folder")
    s.add_argument("--min-cell", type=int, default=None, metavar="N",
                   help="suppress counts below N in every output (default 11)")
    s.add_argument("--top", type=int, default=None, metavar="K", help="rows in the terminal table")
    s.add_argument("--quiet", action="store_true", help="no progress bars or table")

    d = sub.add_parser("demo", help="generate the Vallmora demo registry, scan it, write outputs")
    d.add_argument("--out", default="demo-out", help="output folder (default: demo-out)")
    d.add_argument("--force", action="store_true", help="replace an existing output folder")
    d.add_argument("--rows", type=int, default=200_000, help="rows to generate (default 200000)")
    d.add_argument("--seed", type=int, default=7, help="random seed of the generator")
    d.add_argument("--long", action="store_true",
                   help="the long-format version: lab results, dispensings and enrolment periods")
    d.add_argument("--quiet", action="store_true", help="no progress bars or table")
    d.add_argument("--min-cell", type=int, default=None, metavar="N",
                   help="suppress counts below N in every output (default 11)")

    r = sub.add_parser("report", help="rebuild report.html from an output folder's results.json")
    r.add_argument("dir", help="output folder holding results.json")
    r.add_argument("--min-cell", type=int, default=None, metavar="N",
                   help="re-apply suppression with a larger minimum cell size N (results.json "
                        "itself is left as written)")

    ru = sub.add_parser("rules", help="work with rule catalogues")
    rsub = ru.add_subparsers(dest="rules_command", required=True, metavar="ACTION")
    v = rsub.add_parser("validate", help="check rule catalogues for errors")
    v.add_argument("files", nargs="+", help="catalogue files (TOML)")
    li = rsub.add_parser("list", help="show rules as a table (default: the shipped catalogues)")
    li.add_argument("files", nargs="*", help="catalogue files (TOML); none = shipped catalogues")
    li.add_argument("--quantity", default=None, metavar="Q", help="only rules on this quantity")

    c = sub.add_parser("check", help="did one rule change care? jumps by period, before/after "
                       "its date, and where uptake jumps")
    c.add_argument("spec", help="scan spec (TOML) with data.date and rule catalogues")
    c.add_argument("--rule", required=True, metavar="ID", help="id of the rule to check")
    c.add_argument("--treatment", default=None, metavar="T", help="only this treatment")
    c.add_argument("--period", default="auto", choices=("auto", "quarter", "year"),
                   help="period length (default: chosen from the rows near the line)")
    c.add_argument("--out", default="check-out", help="folder for the JSON and the timeline "
                   "figure (default: check-out)")
    c.add_argument("--force", action="store_true", help="replace existing files of this rule")
    c.add_argument("--min-cell", type=int, default=None, metavar="N",
                   help="suppress counts below N (default 11)")
    return p


def _progress(console):
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
    bar = Progress(TextColumn("{task.description}"), BarColumn(), TextColumn("{task.completed:,.0f}"),
                   TimeElapsedColumn(), console=console, transient=True)
    tasks = {}

    def tick(stage, advance, total):
        if stage not in tasks:
            label = "binning rows" if stage == "bin" else "estimating candidates"
            tasks[stage] = bar.add_task(label, total=total)
        bar.update(tasks[stage], advance=advance)
    return bar, tick


def _run_scan(spec_path, out, force, min_cell, top, quiet, data=None) -> int:
    from dataclasses import replace
    from rich.console import Console
    from .report.outputs import plain_lines, terminal_table, write_outputs
    from .scan import scan
    from .spec import load_spec
    from .report.outputs import check_out
    out = Path(out)
    spec = load_spec(spec_path)
    protect = [spec.path] + ([spec.resolve(spec.source)] if spec.source else [])
    check_out(out, force, protect)   # before the scan: a refused --out should not cost a scan
    if min_cell is not None:
        if min_cell < 1:
            raise InputError(f"--min-cell {min_cell}: the minimum cell size must be at least 1.")
        spec = replace(spec, min_cell=min_cell)
    if top is not None:
        spec = replace(spec, top=top)
    console = Console(stderr=False)
    session = _spark_session(spec) if data is None else None
    try:
        if quiet or not console.is_terminal:      # no progress bars into a pipe or a file
            result = scan(spec, data)
        else:
            bar, tick = _progress(console)
            with bar:
                result = scan(spec, data, progress=tick)
    finally:
        if session is not None:
            session.stop()
    write_outputs(result, out, force=force, protect=protect)
    if not quiet:
        results = result.to_dict()
        if console.is_terminal:
            console.print(terminal_table(results, spec.top, console.width))
        else:
            print(plain_lines(results, spec.top))
        console.print(f"[dim]{CAUTION}[/]")
        console.print(f"Wrote {out}/results.json, candidates.csv, report.html, results.md and bins.csv")
    print_warnings(result.warnings, result.notes, spec.min_cell)
    return 0


def print_warnings(warnings, notes=(), min_cell: int = 11) -> None:
    """Every warning, after the table, on stderr (also with --quiet): one paragraph each, with
    small counts suppressed as in the files."""
    from .report.disclosure import scrub_text
    for w in warnings:
        print(f"cutscan: warning [{w['kind']}]: {scrub_text(w['message'], min_cell)}",
              file=sys.stderr)
    for n in notes:
        text = n[len("warning: "):] if n.startswith("warning: ") else n
        print(f"cutscan: note: {scrub_text(text, min_cell)}", file=sys.stderr)


def _spark_session(spec):
    """``data.engine = "spark"`` from the command line: start a local[2] session (the library
    itself never starts one).  Returns the session to stop, or None."""
    if spec.engine != "spark":
        return None
    from .engines.spark import _pyspark, local_session   # pyspark only on this branch
    SparkSession = _pyspark()[0]
    if SparkSession.getActiveSession() is not None:
        return None
    return local_session("local[2]")


def _demo(args) -> int:
    from .demo import write_inputs
    from .report.outputs import check_out
    out = Path(args.out)
    check_out(out, args.force)
    tmp = Path(tempfile.mkdtemp(prefix="cutscan-demo-"))
    try:
        if args.long:
            from .events.demo_long import write_long
            spec = write_long(tmp / "input", n_persons=max(args.rows // 4, 1000), seed=args.seed)
        else:
            spec = write_inputs(tmp / "input", n=args.rows, seed=args.seed)
        _run_scan(spec, out, args.force, args.min_cell, None, args.quiet)
        shutil.copytree(tmp / "input", out / "input")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return 0


def _report(args) -> int:
    from .report.outputs import write_derived
    folder = Path(args.dir)
    path = folder / "results.json"
    if not path.exists():
        raise InputError(f"{path}: not found; point cutscan report at a folder written by cutscan scan.")
    try:
        results = json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}: not valid JSON (line {exc.lineno}); re-run cutscan scan.") from None
    if args.min_cell is not None:
        old = results.get("disclosure", {}).get("min_cell", 11)
        if args.min_cell < old:
            raise InputError(f"--min-cell {args.min_cell}: {path} was written with minimum cell "
                             f"size {old}; a smaller value cannot restore suppressed counts. "
                             f"Use {old} or more, or re-run cutscan scan with --min-cell {args.min_cell}.")
        from .report.disclosure import tighten
        results = tighten(results, args.min_cell)
    try:
        write_derived(results, folder)
    except (KeyError, TypeError) as exc:
        raise InputError(f"{path}: field {exc} is missing or malformed; it was not written by "
                         "this version of cutscan — re-run cutscan scan.") from None
    print(f"Wrote {folder / 'report.html'}, results.md and bins.csv")
    return 0


def _rules_validate(args) -> int:
    from .rules import validate_catalogues
    rules, problems = validate_catalogues(args.files)
    for p in problems:
        print(f"cutscan: {p}", file=sys.stderr)
    if problems:
        print(f"cutscan: {len(problems)} problem(s) in {len(args.files)} catalogue(s).", file=sys.stderr)
        return 2
    print(f"{len(args.files)} catalogue(s), {len(rules)} rule(s): no errors")
    return 0


def _rules_list(args) -> int:
    from rich.console import Console
    from rich.table import Table
    from .rules import load_rules, shipped_catalogues
    files = args.files or shipped_catalogues()
    rules = load_rules(files)
    if args.quantity:
        known = sorted({r.quantity for r in rules})
        rules = [r for r in rules if r.quantity == args.quantity]
        if not rules:
            from .errors import closest
            raise InputError(f"--quantity {args.quantity}: no rule concerns it"
                             f"{closest(args.quantity, known)}; quantities: {', '.join(known)}.")
    sign = {"below": "<", "at_or_below": "≤", "above": ">", "at_or_above": "≥"}
    tab = Table(header_style="bold", title=f"{len(rules)} rule(s) from {len(files)} catalogue(s)",
                title_justify="left")
    for col in ("id", "quantity", "eligible", "unit", "in force"):
        tab.add_column(col, no_wrap=True)
    for col in ("description", "source"):
        tab.add_column(col, overflow="fold", ratio=1)
    for r in rules:
        when = (f"{r.effective_from or '…'} to {r.effective_to or '…'}"
                if r.effective_from or r.effective_to else "")
        tab.add_row(r.id, r.quantity, f"{sign[r.eligible]} {r.cutoff:g}", r.unit or "", when,
                    r.description, r.source)
    Console().print(tab)
    return 0


def _check(args) -> int:
    from rich.console import Console
    from .check import check, render, to_dict, write_figure
    from .report.outputs import write_json
    min_cell = 11 if args.min_cell is None else args.min_cell
    if min_cell < 1:
        raise InputError(f"--min-cell {min_cell}: the minimum cell size must be at least 1.")
    out = Path(args.out)
    safe = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in args.rule)
    target = out / f"{safe}.json"
    if target.exists() and not args.force:
        raise InputError(f"{target}: exists; choose another --out or add --force to replace it.")
    results = check(args.spec, args.rule, treatment=args.treatment, granularity=args.period)
    out.mkdir(parents=True, exist_ok=True)
    console = Console()
    for res in results:
        tab, text = render(res, min_cell)
        console.print(tab)
        console.print(text)
        stem = safe if len(results) == 1 else f"{safe}.{res.treatment}"
        write_figure(res, out / f"{stem}.timeline.png", min_cell)
    write_json({"version": 1, "checks": [to_dict(r, min_cell) for r in results]}, target)
    if len(results) > 1 and args.treatment is None and not results[0].rule.treatments:
        console.print(f"Rule '{results[0].rule.id}' lists no treatments, so all {len(results)} "
                      "treatments of its running variable are shown; name its own with "
                      "treatments = [...] in the catalogue, or pass --treatment T.")
    console.print(f"[dim]{CAUTION}[/]")
    console.print(f"Wrote {target} and the timeline figure(s) in {out}")
    return 0


def _on_term(signum, frame):
    raise KeyboardInterrupt   # unwinds through write_outputs, which removes its temporary folder


def main(argv=None) -> int:
    """Run the command; returns the exit code (0 ok, 2 bad input, 1 internal, 130 interrupted)."""
    import signal
    import threading
    try:
        args = _parser().parse_args(argv)
    except SystemExit as exc:   # argparse: usage errors exit 2 with its own message
        return int(exc.code or 0)
    previous = None
    if threading.current_thread() is threading.main_thread():
        previous = signal.signal(signal.SIGTERM, _on_term)
    try:
        return _dispatch(args)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _dispatch(args) -> int:
    import warnings
    with warnings.catch_warnings():
        if not args.debug:
            # numpy's overflow/invalid-value warnings on degenerate sums are internals: the
            # affected candidates already say "not estimable" and why.
            warnings.simplefilter("ignore", RuntimeWarning)
        return _guarded(args)


def _guarded(args) -> int:
    try:
        if args.command == "scan":
            return _run_scan(args.spec, args.out, args.force, args.min_cell, args.top, args.quiet)
        if args.command == "demo":
            return _demo(args)
        if args.command == "report":
            return _report(args)
        if args.command == "rules" and args.rules_command == "validate":
            return _rules_validate(args)
        if args.command == "rules" and args.rules_command == "list":
            return _rules_list(args)
        if args.command == "check":
            return _check(args)
    except ScanError as exc:
        if args.debug:
            raise
        print(f"cutscan: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        # the reader of a pipe (head, less) stopped early: nothing is wrong with the scan
        import os
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except KeyboardInterrupt:
        print("cutscan: interrupted; no partial output was written (an existing output folder "
              "is left as it was).", file=sys.stderr)
        return 130
    except Exception as exc:  # internal failure
        if args.debug:
            raise
        print(f"cutscan: internal error: {type(exc).__name__}: {exc} (re-run with --debug for "
              "the traceback, and please report it)", file=sys.stderr)
        return 1
    return 1


if __name__ == "__main__":
    sys.exit(main())
