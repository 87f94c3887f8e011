"""``loopwright reanalyze RUN_DIR``: every point recomputed from the stored raw captures."""

from __future__ import annotations

import argparse
from typing import Any

from rich.console import Console

from loopwright.procedure.reanalyze import reanalyze_run


def register(subparsers: Any) -> None:
    """Add the ``reanalyze`` command."""
    parser = subparsers.add_parser(
        "reanalyze",
        help="recompute a run's points from its raw captures into a new run folder",
        description=(
            "Recomputes every point of a run folder from its raw captures "
            "(captures/point_NNNNN.npz, kept by a sweep with keep_captures: true) with "
            "the present code, applying the stored sign and channel calibration as the "
            "runner does, then the loop figures, limits and report. The result is a new "
            "run folder that records reanalysis_of; the source folder is only read. "
            "Points without a capture are copied and listed as not recomputed."),
    )
    parser.add_argument("run_dir", metavar="RUN_DIR", help="the stored run folder")
    parser.add_argument("--estimator", choices=("sinefit", "dft", "xcorr"), default=None,
                        help="estimator for every point (default: each sweep's own)")
    parser.add_argument("--out", default=None, metavar="DIR",
                        help="folder for the new run folder (default: next to RUN_DIR)")
    parser.add_argument("--no-report", action="store_true",
                        help="skip report.html and the Bode plot")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Reanalyse; 0 when done."""
    console = Console()
    outcome = reanalyze_run(args.run_dir, estimator=args.estimator, out_dir=args.out,
                            render_report=not args.no_report)
    summary = outcome.summary
    analysis = summary.get("analysis") or {}
    console.print(f"reanalysis complete: {outcome.run_dir}", highlight=False)
    console.print(f"  recomputed {len(outcome.recomputed)} point(s) from raw captures",
                  highlight=False)
    if outcome.not_recomputed:
        console.print(f"  [yellow]not recomputed (no capture, copied as stored):[/] "
                      f"{len(outcome.not_recomputed)} point(s)", highlight=False)
    if outcome.single_record:
        console.print(f"  [yellow]averaged points recomputed from their last record only:[/]"
                      f" {len(outcome.single_record)}", highlight=False)
    for key, label, unit in (("phase_margin_deg", "phase margin", "deg"),
                             ("gain_margin_db", "gain margin", "dB"),
                             ("phase_margin_frequency_hz", "crossover", "Hz")):
        value = analysis.get(key)
        shown = "not reached" if value is None else f"{value:.4g} {unit}"
        console.print(f"  {label}: {shown}", highlight=False)
    console.print(f"  verdict: {str(summary.get('verdict', 'none')).upper()}", highlight=False)
    return 0
