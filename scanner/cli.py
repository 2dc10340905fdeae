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
    d.add_argument("--quiet", action="store_true", help="no progress bars or table")

    r = sub.add_parser("report", help="rebuild report.html from an output folder's results.json")
    r.add_argument("dir", help="output folder holding results.json")

    ru = sub.add_parser("rules", help="work with rule catalogues")
    rsub = ru.add_subparsers(dest="rules_command", required=True, metavar="ACTION")
    v = rsub.add_parser("validate", help="check rule catalogues for errors")
    v.add_argument("files", nargs="+", help="catalogue files (TOML)")
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
    from .report.outputs import terminal_table, write_outputs
    from .scan import scan
    from .spec import load_spec
    out = Path(out)
    if out.exists() and not force:
        raise InputError(f"{out}: output folder exists; choose another --out or add --force to replace it.")
    spec = load_spec(spec_path)
    if min_cell is not None:
        if min_cell < 1:
            raise InputError(f"--min-cell {min_cell}: the minimum cell size must be at least 1.")
        spec = replace(spec, min_cell=min_cell)
    if top is not None:
        spec = replace(spec, top=top)
    console = Console(stderr=False)
    session = _spark_session(spec) if data is None else None
    try:
        if quiet:
            result = scan(spec, data)
        else:
            bar, tick = _progress(console)
            with bar:
                result = scan(spec, data, progress=tick)
    finally:
        if session is not None:
            session.stop()
    write_outputs(result, out, force=force)
    if not quiet:
        console.print(terminal_table(result.to_dict(), spec.top))
        console.print(f"[dim]{CAUTION}[/]")
        console.print(f"Wrote {out}/results.json, candidates.csv and report.html")
    return 0


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
    out = Path(args.out)
    if out.exists() and not args.force:
        raise InputError(f"{out}: output folder exists; choose another --out or add --force to replace it.")
    tmp = Path(tempfile.mkdtemp(prefix="cutscan-demo-"))
    try:
        spec = write_inputs(tmp / "input", n=args.rows, seed=args.seed)
        _run_scan(spec, out, args.force, None, None, args.quiet)
        shutil.copytree(tmp / "input", out / "input")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return 0


def _report(args) -> int:
    from .report.html import write_report
    folder = Path(args.dir)
    path = folder / "results.json"
    if not path.exists():
        raise InputError(f"{path}: not found; point cutscan report at a folder written by cutscan scan.")
    try:
        results = json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}: not valid JSON (line {exc.lineno}); re-run cutscan scan.") from None
    write_report(results, folder / "report.html")
    print(f"Wrote {folder / 'report.html'}")
    return 0


def _rules_validate(args) -> int:
    from .rules import load_rules
    n = 0
    for f in args.files:
        n += len(load_rules([f]))
    print(f"{len(args.files)} catalogue(s), {n} rule(s): no errors")
    return 0


def main(argv=None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.command == "scan":
            return _run_scan(args.spec, args.out, args.force, args.min_cell, args.top, args.quiet)
        if args.command == "demo":
            return _demo(args)
        if args.command == "report":
            return _report(args)
        if args.command == "rules" and args.rules_command == "validate":
            return _rules_validate(args)
    except ScanError as exc:
        if args.debug:
            raise
        print(f"cutscan: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("cutscan: interrupted; no output was written.", file=sys.stderr)
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
