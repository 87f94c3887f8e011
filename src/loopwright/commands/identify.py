"""``loopwright identify RESOURCE``: ask an instrument who it is and which driver fits."""

from __future__ import annotations

import argparse

from loopwright.errors import InputError
from loopwright.instruments.driver import ROLES, find_drivers
from loopwright.instruments.session import Session

#: Longest read timeout accepted on the command line, seconds (one hour).
MAX_TIMEOUT_S = 3600.0


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``identify`` command."""
    parser = subparsers.add_parser(
        "identify", help="print an instrument's *IDN? and the driver that matches it",
        description="Open a VISA resource, ask *IDN? and name the drivers whose match"
                    " rule fits.")
    parser.add_argument("resource", help="VISA resource, e.g. TCPIP0::127.0.0.1::5025::SOCKET")
    parser.add_argument("--backend", default="@py",
                        help="pyvisa backend (default @py, pyvisa-py)")
    parser.add_argument("--timeout", type=float, default=5.0, metavar="SECONDS",
                        help="read timeout in seconds (default 5)")
    parser.add_argument("--drivers", action="append", default=[], metavar="DIR",
                        help="also search this folder for driver files (repeatable)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Print the identity and the matching drivers; exit 1 when none matches."""
    # an upper bound keeps the value within what the VISA layer accepts (milliseconds)
    if not 0 < args.timeout <= MAX_TIMEOUT_S:
        raise InputError(f"--timeout must be more than 0 and at most {MAX_TIMEOUT_S:g}"
                         f" seconds, got {args.timeout}")
    with Session(args.resource, backend=args.backend, timeout_s=args.timeout) as session:
        identity = session.identity
    print(f"resource  {args.resource}")
    print(f"identity  {identity}")
    drivers = find_drivers(args.drivers)
    matched = False
    for role in ROLES:
        for loaded in drivers:
            if loaded.role == role and loaded.spec.match.matches(identity):
                print(f"driver    {loaded.name} ({role}, {loaded.path})")
                matched = True
                break
    if not matched:
        print("driver    none matches; name one with --driver, or add a driver file"
              " (loopwright drivers list)")
        return 1
    return 0
