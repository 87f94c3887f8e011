"""``loopwright sim``: a simulated bench on loopback TCP, and the DUT models it knows.

``loopwright sim serve`` starts a simulated generator, two-channel scope and relay box
around one DUT model, each on its own TCP port, prints one line per instrument (role,
VISA resource string, dialect) or, with ``--json``, one JSON line, and serves until
Ctrl-C or SIGTERM. ``loopwright sim list`` lists the DUT models.
"""

from __future__ import annotations

import argparse
import json
import signal
import sys
import threading
from typing import Any

from loopwright.errors import InputError

#: DUT served when none is named.
DEFAULT_DUT = "rational"


def register(subparsers: Any) -> None:
    """Add the ``sim`` command with its ``serve`` and ``list`` actions."""
    from mock_instruments.instruments import ROLE_DIALECTS

    parser = subparsers.add_parser(
        "sim",
        help="serve a simulated bench on loopback TCP, or list its DUT models",
        description="A simulated generator, scope and relay box around a DUT model.",
    )
    actions = parser.add_subparsers(dest="sim_action", metavar="ACTION")
    parser.set_defaults(func=lambda args: _usage(parser))

    serve = actions.add_parser(
        "serve",
        help="serve a simulated bench until Ctrl-C or SIGTERM",
        description=(
            "Start a simulated generator, two-channel scope and relay box around one DUT "
            "model, one TCP port each, and print their VISA resource strings. Binds to "
            "127.0.0.1 unless --host is given."
        ),
    )
    serve.add_argument(
        "--dut",
        default=DEFAULT_DUT,
        metavar="NAME|FILE",
        help=f"a DUT model name (see 'loopwright sim list') or a DUT YAML file "
        f"(default {DEFAULT_DUT})",
    )
    serve.add_argument(
        "--noise",
        type=float,
        default=0.0,
        metavar="V_RMS",
        help="white noise on each scope channel, volts rms at the probe tip (default 0)",
    )
    serve.add_argument(
        "--bits",
        type=int,
        default=12,
        choices=(0, 8, 10, 12, 14, 16),
        help="scope ADC resolution; 0 is an ideal converter (default 12)",
    )
    serve.add_argument(
        "--generator",
        default="generator-source-tree",
        choices=ROLE_DIALECTS["generator"],
        help="the generator's command dialect (default generator-source-tree)",
    )
    serve.add_argument(
        "--scope",
        default="scope-block",
        choices=ROLE_DIALECTS["scope"],
        help="the scope's command dialect (default scope-block)",
    )
    serve.add_argument(
        "--realtime",
        action="store_true",
        help="acquisitions take their real duration (default: as fast as computed)",
    )
    serve.add_argument(
        "--host",
        default="127.0.0.1",
        help="address to listen on (default 127.0.0.1: this computer only)",
    )
    serve.add_argument(
        "--port",
        type=int,
        default=0,
        metavar="BASE",
        help="fixed ports BASE (generator), BASE+1 (scope), BASE+2 (relay box); "
        "default: free ports",
    )
    serve.add_argument("--seed", type=int, default=None, help="seed of noise and jitter")
    serve.add_argument(
        "--json", action="store_true", help="print one JSON line instead of one line each"
    )
    serve.set_defaults(func=run_serve)

    listing = actions.add_parser("list", help="list the DUT models")
    listing.add_argument("--json", action="store_true", help="print JSON")
    listing.set_defaults(func=run_list)


def _usage(parser: argparse.ArgumentParser) -> int:
    parser.print_help()
    return 2


def run_list(args: argparse.Namespace) -> int:
    """Print every DUT model with its one-line description."""
    from mock_instruments.duts import model_list

    models = model_list()
    if args.json:
        print(json.dumps([{"name": n, "description": d} for n, d in models]))
        return 0
    width = max((len(n) for n, _ in models), default=0)
    for name, description in models:
        print(f"{name:<{width}}  {description}")
    return 0


def run_serve(args: argparse.Namespace) -> int:
    """Serve the simulated bench until Ctrl-C or SIGTERM; returns 0."""
    if not args.noise >= 0:
        raise InputError(f"--noise must be >= 0 volts rms, got {args.noise}")
    if not 0 <= args.port <= 65533:
        raise InputError(f"--port must be 0 (free ports) or 1..65533, got {args.port}")
    if args.seed is not None and args.seed < 0:
        raise InputError(f"--seed must be a whole number >= 0, got {args.seed}")
    stop = threading.Event()
    # Handlers first, so a SIGTERM during start-up still ends in a clean exit.
    previous = {
        sig: signal.signal(sig, lambda signum, frame: stop.set())
        for sig in (signal.SIGINT, signal.SIGTERM)
    }
    try:
        return _serve(args, stop)
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


def _serve(args: argparse.Namespace, stop: threading.Event) -> int:
    from mock_instruments.bench import Impairments, SimulatedBench
    from mock_instruments.server import serve_bench

    impairments = Impairments(noise_v_rms=(args.noise, args.noise), adc_bits=args.bits)
    bench = SimulatedBench(args.dut, impairments, seed=args.seed)
    dialects = {"generator": args.generator, "scope": args.scope, "switch": "switch-relay"}
    ports = {role: args.port + k for k, role in enumerate(dialects)} if args.port else None
    try:
        server = serve_bench(
            bench, dialects, host=args.host, realtime=args.realtime, ports=ports, seed=args.seed
        )
    except OSError as exc:
        raise InputError(f"cannot listen on {args.host}: {exc.strerror or exc}") from exc
    try:
        if args.json:
            summary = {
                "resources": server.resources,
                "dialects": dialects,
                "dut": args.dut,
                "host": args.host,
                "realtime": args.realtime,
            }
            print(json.dumps(summary))
        else:
            for role, resource in server.resources.items():
                print(f"{role:<10} {resource}  {dialects[role]}")
        sys.stdout.flush()
        where = "this computer only" if args.host == "127.0.0.1" else f"the network ({args.host})"
        print(
            f"serving DUT {args.dut!r} to {where}; Ctrl-C or SIGTERM stops",
            file=sys.stderr,
            flush=True,
        )
        while not stop.wait(0.5):
            pass
    finally:
        server.close()
    print("simulated bench stopped", file=sys.stderr, flush=True)
    return 0
