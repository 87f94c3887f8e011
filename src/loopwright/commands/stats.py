"""``loopwright stats``: count, mean, std, min, max and Cpk of every limited figure."""

from __future__ import annotations

import argparse
import json


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``stats`` command."""
    parser = subparsers.add_parser(
        "stats",
        help="population statistics and Cpk of limited figures from a results index",
        description=(
            "Per figure (and its limits): count, mean, sample std, min, max and Cpk, "
            "with a histogram in the terminal and, with --png, in a PNG file."
        ),
    )
    parser.add_argument(
        "source", metavar="DIR_OR_INDEX",
        help="output folder holding index.sqlite, an SQLite index file, or postgresql://...",
    )
    parser.add_argument(
        "--since", default=None, metavar="ISO_DATE",
        help="only runs started at or after this UTC date/time (2026-03-01, 2026-03-01T08:00Z)",
    )
    parser.add_argument(
        "--figure", default=None, metavar="NAME", help="only this figure (or limit name)"
    )
    parser.add_argument("--png", default=None, metavar="FILE", help="write histograms to FILE")
    parser.add_argument("--json", action="store_true", help="print the statistics as JSON")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Print (or write as JSON and PNG) the statistics of every limited figure."""
    from rich.console import Console
    from rich.markup import escape

    from loopwright.errors import InputError
    from loopwright.production.index import open_index, parse_utc
    from loopwright.production.stats import (
        group_values,
        load_figure_table,
        population_stats,
        render_histogram,
        write_histogram_png,
    )

    since = parse_utc(args.since, what="--since")
    with open_index(args.source, create=False) as index:
        frame = load_figure_table(index, since=since, figure=args.figure)
        where = index.where
    groups = population_stats(frame)
    if not groups and args.figure is not None:
        raise InputError(f"no figure or limit named {args.figure!r} in {where}", field="--figure")
    if args.json:
        print(json.dumps([g.to_dict() for g in groups], indent=2))
    else:
        console = Console()
        runs = frame["run_id"].nunique() if not frame.empty else 0
        retests = int(frame.drop_duplicates("run_id")["retest"].sum()) if runs else 0
        console.print(f"{escape(where)}: {runs} runs ({retests} retests) with limited figures")
        for g in groups:
            unit = escape(f" ({g.unit})") if g.unit else ""
            console.print(  # names and units come from files: escaped, never markup
                f"\n[bold]{escape(g.figure)}[/bold]{unit}   LSL {_f(g.limit_min)}   "
                f"USL {_f(g.limit_max)}\n  [bold]Cpk {_f(g.cpk, 3)}[/bold]  n {g.count}  "
                f"fail {g.failed}  mean {_f(g.mean)}  std {_f(g.std)}  min {_f(g.min)}  "
                f"max {_f(g.max)}",
                highlight=False,
            )
            for line in render_histogram(group_values(frame, g), g):
                console.print("  " + line, highlight=False)
    if args.png:
        title = where if args.since is None else f"{where} since {args.since}"
        path = write_histogram_png(
            args.png, [(g, group_values(frame, g)) for g in groups], title=title
        )
        if not args.json:
            print(f"histograms written to {path}")
    return 0


def _f(value, digits: int = 4) -> str:
    return "-" if value is None else f"{value:.{digits}g}"
