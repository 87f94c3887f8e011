"""``loopwright drivers list`` and ``loopwright drivers check FILE``."""

from __future__ import annotations

import argparse

from loopwright.instruments.driver import driver_dirs, find_drivers, load_driver


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``drivers`` command with its ``list`` and ``check`` actions."""
    parser = subparsers.add_parser(
        "drivers", help="list the instrument drivers or check a driver file",
        description="Driver files describe one SCPI command dialect each.")
    actions = parser.add_subparsers(dest="action", metavar="ACTION")
    listing = actions.add_parser("list", help="list the drivers found (name, role, dialect, file)")
    listing.add_argument("--drivers", action="append", default=[], metavar="DIR",
                         help="also search this folder (repeatable; searched first)")
    listing.set_defaults(func=run_list)
    check = actions.add_parser("check", help="validate driver files; exit 2 on the first problem")
    check.add_argument("files", nargs="+", metavar="FILE")
    check.set_defaults(func=run_check)
    parser.set_defaults(func=lambda args: (parser.print_help(), 2)[1])


def run_list(args: argparse.Namespace) -> int:
    """Print one line per driver."""
    drivers = find_drivers(args.drivers)
    rows = [(d.name, d.role, d.spec.dialect, str(d.path)) for d in drivers]
    header = ("name", "role", "dialect", "file")
    widths = [max(len(r[i]) for r in [header, *rows]) for i in range(3)]
    for row in [header, *rows]:
        print("  ".join(cell.ljust(w) for cell, w in zip(row[:3], widths, strict=True))
              + "  " + row[3])
    print(f"searched: {', '.join(str(d) for d in driver_dirs(args.drivers))}")
    return 0


def run_check(args: argparse.Namespace) -> int:
    """Validate each file; the first problem raises (file:line: field: problem, exit 2)."""
    for path in args.files:
        loaded = load_driver(path)
        print(f"{path}: ok ({loaded.name}, {loaded.role})")
    return 0
