"""``loopwright compare RUN_DIR... [--out FILE]``: several runs on one Bode plot."""

from __future__ import annotations

import argparse
import sys


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``compare`` command."""
    parser = subparsers.add_parser(
        "compare",
        help="overlay several runs on one Bode plot with a table of their figures",
        description="Overlay the open-loop responses of several runs (boards, "
        "temperatures, before/after a change) and tabulate each run's figures with "
        "their spread (mean, std, min, max). Writes a self-contained HTML file and a "
        "PNG beside it.",
    )
    parser.add_argument("run_dirs", metavar="RUN_DIR", nargs="+", help="run folders")
    parser.add_argument("--out", default="comparison.html", metavar="FILE",
                        help="the HTML file to write (default: comparison.html); "
                        "the PNG gets the same name")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Render the comparison and print the files written."""
    from loopwright.report.compare import render_comparison

    files = render_comparison(args.run_dirs, args.out,
                              progress=not args.quiet and sys.stderr.isatty())
    for path in files:
        print(path)
    return 0
