"""``loopwright report RUN_DIR``: re-render a run's report from its folder alone."""

from __future__ import annotations

import argparse


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``report`` command."""
    parser = subparsers.add_parser(
        "report",
        help="render report.html, bode.png and bode.svg of a run folder",
        description="Render the self-contained HTML report and the Bode plot (PNG, SVG) "
        "of a run from the files in its folder.",
    )
    parser.add_argument("run_dir", metavar="RUN_DIR", help="the run folder")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Render the report and print the files written."""
    from loopwright.report import render_report

    files = render_report(args.run_dir)
    for path in files:
        print(path)
    return 0
