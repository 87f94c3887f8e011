"""``loopwright export RUN_DIR --format csv|json [--out FILE]``."""

from __future__ import annotations

import argparse

FORMATS = ("csv", "json")


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``export`` command."""
    parser = subparsers.add_parser(
        "export",
        help="write a run's points as CSV (for a spreadsheet) or everything as JSON",
        description="CSV: the points, units in the column names, plain commas, dot "
        "decimals, one header row. JSON: manifest, summary, points and calibration.",
    )
    parser.add_argument("run_dir", metavar="RUN_DIR", help="the run folder")
    parser.add_argument("--format", required=True, choices=FORMATS, dest="fmt",
                        help="csv or json")
    parser.add_argument("--out", default=None, metavar="FILE",
                        help="the file to write (default: standard output)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Write the export to ``--out`` (and print its path) or to standard output."""
    import sys

    from loopwright.report.export import export_run, export_text

    if args.out is None:
        sys.stdout.write(export_text(args.run_dir, args.fmt))
    else:
        print(export_run(args.run_dir, args.fmt, args.out))
    return 0
