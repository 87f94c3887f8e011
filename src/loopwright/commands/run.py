"""``loopwright run PROCEDURE --bench BENCH``: one procedure on one bench, into a run folder."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from rich.console import Console
from rich.markup import escape

from loopwright.procedure.runner import RunOptions, RunOutcome, run_procedure


def register(subparsers: Any) -> None:
    """Add the ``run`` command."""
    parser = subparsers.add_parser(
        "run",
        help="run a procedure on a bench and write a run folder",
        description=(
            "Runs the procedure's steps (sweeps, channel calibration, closed-loop check, "
            "prompts) on the bench file's instruments, writing every point to "
            "runs/<UTC time>_<procedure>_<serial>/ as it is measured. The generator "
            "output is switched off on every exit. Ctrl-C stops the run; --resume "
            "continues it without repeating a point."),
    )
    parser.add_argument("procedure", metavar="PROCEDURE", help="procedure YAML file")
    parser.add_argument("--bench", required=True, metavar="BENCH", help="bench YAML file")
    parser.add_argument("--serial", default="no-serial", help="board serial number")
    parser.add_argument("--operator", default=None, help="operator name for the record")
    parser.add_argument("--station", default=None, help="station name for the record")
    parser.add_argument("--out", default="runs", metavar="DIR",
                        help="folder that holds run folders (default: runs)")
    parser.add_argument("--resume", default=None, metavar="RUN_DIR",
                        help="continue an interrupted run folder")
    parser.add_argument("--drivers", action="append", default=[], metavar="DIR",
                        help="an extra folder of driver files (repeatable)")
    parser.add_argument("--yes", action="store_true",
                        help="allow switching a real generator on without a terminal")
    parser.add_argument("--quiet", action="store_true", help="show only the result")
    parser.add_argument("--no-report", action="store_true",
                        help="skip report.html and the Bode plot")
    parser.set_defaults(func=run)


def print_outcome(outcome: RunOutcome, console: Console) -> None:
    """One paragraph on how the run ended."""
    summary = outcome.summary or {}
    verdict = summary.get("verdict", "none")
    colour = {"pass": "green", "fail": "red"}.get(verdict, "white")
    console.print(f"run {outcome.status}: {escape(str(outcome.run_dir))}")
    if outcome.reason:
        console.print(f"  reason: {escape(outcome.reason)}")
    if outcome.status == "complete":
        console.print(f"  verdict: [bold {colour}]{verdict.upper()}[/]")
        for limit in summary.get("limits", []):
            value = limit.get("value")
            shown = "not reached" if value is None else f"{value:.4g} {limit.get('unit', '')}"
            mark = "ok  " if limit.get("passed") else "FAIL"
            console.print(f"    {mark} {escape(limit['name'])}: {escape(shown)}",
                          highlight=False)
    else:
        console.print("  continue it with: loopwright run ... --resume"
                      f" {escape(str(outcome.run_dir))}")
    console.print(f"  generator output off: {'yes' if outcome.output_off else 'NOT CONFIRMED'}")


def run(args: argparse.Namespace) -> int:
    """Run the procedure; 0 = complete, 1 = failed, 130 = stopped by the operator."""
    console = Console()
    options = RunOptions(
        out_dir=Path(args.out), serial=args.serial, operator=args.operator,
        station=args.station, resume=Path(args.resume) if args.resume else None,
        quiet=args.quiet, assume_yes=args.yes, render_report=not args.no_report,
        extra_driver_dirs=tuple(Path(d) for d in args.drivers))
    outcome = run_procedure(args.procedure, args.bench, options, console)
    print_outcome(outcome, console)
    return 0 if outcome.status == "complete" else 130
