"""``loopwright replay RUN_DIR``: a stored run becomes a simulated board; run a procedure on it."""

from __future__ import annotations

import argparse
from typing import Any

from rich.console import Console

from loopwright.commands.run import print_outcome
from loopwright.errors import InputError
from loopwright.procedure.replay import replay_run


def register(subparsers: Any) -> None:
    """Add the ``replay`` command."""
    parser = subparsers.add_parser(
        "replay",
        help="run a procedure against a simulated board built from a stored run",
        description=(
            "Builds a simulated board from a run folder: its measured response (as the "
            "analysis interpolates it; end values held outside the swept range), each "
            "channel's noise from the stored SNR and the stored channel mismatch. The "
            "board is served on the simulated bench over loopback TCP and the procedure "
            "(by default the stored one, as it ran) is run against it like on hardware. "
            "The new run folder records replay_of; the source folder is not changed."),
    )
    parser.add_argument("run_dir", metavar="RUN_DIR", help="the stored run folder")
    parser.add_argument("--procedure", default=None, metavar="FILE",
                        help="procedure to run (default: the stored one)")
    parser.add_argument("--out", default=None, metavar="DIR",
                        help="folder for the new run folder (default: next to RUN_DIR)")
    parser.add_argument("--seed", type=int, default=1, metavar="N",
                        help="seed of the simulated noise (default: 1)")
    parser.add_argument("--step", type=int, default=None, metavar="K",
                        help="the sweep step whose response is replayed (default: the last)")
    parser.add_argument("--quiet", action="store_true", help="show only the result")
    parser.add_argument("--no-report", action="store_true",
                        help="skip report.html and the Bode plot")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Replay; 0 = complete, 130 = stopped by the operator."""
    if args.seed is not None and args.seed < 0:
        raise InputError(f"--seed must be a whole number >= 0, got {args.seed}")
    if args.step is not None and args.step < 0:
        raise InputError(f"--step must be a step index >= 0, got {args.step}")
    console = Console()
    outcome = replay_run(args.run_dir, procedure=args.procedure, out_dir=args.out,
                         seed=args.seed, step=args.step, quiet=args.quiet,
                         render_report=not args.no_report, console=console)
    print_outcome(outcome, console)
    return 0 if outcome.status == "complete" else 130
