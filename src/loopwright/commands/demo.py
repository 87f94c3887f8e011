"""``loopwright demo``: the main job on the simulated bench, no hardware needed.

Starts the simulated bench (an invented LC oscillator loop) on loopback TCP in this
process, runs the bundled oscillator procedure through pyvisa-py exactly as on real
instruments (open-loop sweep with adaptive refinement, then the closed-loop check),
writes the run folder and prints what an engineer wants to know.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path
from typing import Any

from rich.console import Console
from rich.table import Table

from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.resources import data_dir

DEMO_PROCEDURE = "oscillator-startup.yaml"
DEMO_BENCH = "bench-oscillator-sim.yaml"


def register(subparsers: Any) -> None:
    """Add the ``demo`` command."""
    parser = subparsers.add_parser(
        "demo",
        help="run the bundled oscillator procedure on the simulated bench",
        description=(
            "Runs the bundled LC-oscillator procedure (an invented scenario) on the "
            "simulated bench served on loopback TCP, through pyvisa-py, and prints the "
            "predicted oscillation frequency and excess gain, the closed-loop frequency "
            "and amplitude, the margins and the verdict."),
    )
    parser.add_argument("--out", default="runs", metavar="DIR",
                        help="folder that holds run folders (default: runs)")
    parser.add_argument("--quiet", action="store_true", help="show only the result")
    parser.set_defaults(func=run)


def _fmt(value: Any, unit: str, digits: int = 5) -> str:
    if value is None:
        return "not reached"
    return f"{value:.{digits}g} {unit}".strip()


def run(args: argparse.Namespace) -> int:
    """Run the demo; returns 0 when the run completed."""
    console = Console()
    procedures = data_dir("procedures")
    started = time.perf_counter()
    outcome = run_procedure(
        procedures / DEMO_PROCEDURE, procedures / DEMO_BENCH,
        RunOptions(out_dir=Path(args.out), serial="demo-board", operator="demo",
                   quiet=args.quiet),
        console)
    wall_s = time.perf_counter() - started
    summary = outcome.summary or {}
    analysis = summary.get("analysis") or {}
    closed = summary.get("closed_loop") or {}
    table = Table(title="loopwright demo: invented LC oscillator on the simulated bench")
    table.add_column("figure")
    table.add_column("value", justify="right")
    table.add_row("predicted oscillation frequency",
                  _fmt(analysis.get("oscillation_frequency_hz"), "Hz", 7))
    table.add_row("excess gain at 0 deg", _fmt(analysis.get("excess_gain"), "", 4))
    table.add_row("closed-loop frequency", _fmt(closed.get("frequency_hz"), "Hz", 7))
    table.add_row("closed-loop amplitude", _fmt(closed.get("amplitude_v"), "V", 4))
    table.add_row("closed-loop THD", _fmt(closed.get("thd_pct"), "%", 3))
    table.add_row("closed loop vs prediction", _fmt(closed.get("frequency_error_pct"), "%", 3))
    table.add_row("phase margin (worst)", _fmt(analysis.get("phase_margin_deg"), "deg", 4))
    table.add_row("gain margin (worst)", _fmt(analysis.get("gain_margin_db"), "dB", 4))
    verdict = str(summary.get("verdict", "none")).upper()
    table.add_row("verdict", f"[bold]{verdict}[/]")
    console.print(table)
    console.print(f"run folder: {outcome.run_dir}  ({summary.get('points', 0)} points,"
                  f" {wall_s:.1f} s)")
    report = outcome.run_dir / "report.html"
    if report.exists():
        console.print(f"report: {report}")
    return 0 if outcome.status == "complete" else 130
