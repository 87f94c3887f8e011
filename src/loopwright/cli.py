"""The ``loopwright`` command line.

Each sub-command lives in its own module under :mod:`loopwright.commands` and exposes
``register(subparsers)``; the module adds its parser and sets ``func`` on it. ``func``
takes the parsed arguments and returns an exit code. Adding a command touches one file.

Errors of our own print as one line on stderr and exit with their ``exit_code``
(2 for bad input); Ctrl-C exits with 130. Nothing else is caught here, so a real bug
still shows its traceback.
"""

from __future__ import annotations

import argparse
import importlib
import pkgutil
import sys
from collections.abc import Sequence

from loopwright import __version__, commands
from loopwright.errors import LoopwrightError


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every command module registered."""
    parser = argparse.ArgumentParser(
        prog="loopwright",
        description="Open-loop gain/phase sweeps of feedback circuits over VISA.",
    )
    parser.add_argument("--version", action="version", version=f"loopwright {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for info in sorted(pkgutil.iter_modules(commands.__path__), key=lambda m: m.name):
        if info.name.startswith("_"):
            continue
        module = importlib.import_module(f"{commands.__name__}.{info.name}")
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except LoopwrightError as exc:
        print(f"loopwright: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("loopwright: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 1


if __name__ == "__main__":
    sys.exit(main())
