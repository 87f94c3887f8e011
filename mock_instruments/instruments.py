"""The simulated instruments, one per shipped dialect, and how to make them.

Each is a :class:`~mock_instruments.scpi.SimulatedInstrument`: ``handle(command) ->
reply bytes | None`` over a shared :class:`~mock_instruments.bench.SimulatedBench`,
with an error queue (``.errors``) and fault hooks (``.faults``). The TCP server and
the in-process pyvisa backend both wrap this same model.
"""

from __future__ import annotations

import threading
from typing import Any

from mock_instruments.generator import OutputTreeGenerator, SourceTreeGenerator
from mock_instruments.relay import RelayBox
from mock_instruments.scope import BlockScope, TextScope
from mock_instruments.scpi import SimulatedInstrument

#: dialect name -> instrument class.
DIALECTS: dict[str, type[SimulatedInstrument]] = {
    cls.dialect: cls
    for cls in (SourceTreeGenerator, OutputTreeGenerator, BlockScope, TextScope, RelayBox)
}

#: The dialects of each role.
ROLE_DIALECTS: dict[str, tuple[str, ...]] = {
    role: tuple(name for name, cls in DIALECTS.items() if cls.role == role)
    for role in ("generator", "scope", "switch")
}

#: What ``serve_bench`` puts on a bench unless told otherwise.
DEFAULT_DIALECTS: dict[str, str] = {
    "generator": "generator-source-tree",
    "scope": "scope-block",
    "switch": "switch-relay",
}


def make_instrument(
    dialect: str,
    bench: Any,
    *,
    serial: str = "0",
    lock: threading.RLock | None = None,
    realtime: bool = False,
    seed: int | None = None,
) -> SimulatedInstrument:
    """A simulated instrument speaking ``dialect`` on ``bench``.

    Raises
    ------
    ValueError
        ``dialect`` is not one of :data:`DIALECTS`.
    """
    try:
        cls = DIALECTS[dialect]
    except KeyError:
        known = ", ".join(sorted(DIALECTS))
        raise ValueError(f"unknown dialect {dialect!r}; known: {known}") from None
    return cls(bench, serial=serial, lock=lock, realtime=realtime, seed=seed)


def make_instruments(
    bench: Any,
    dialects: dict[str, str] | None = None,
    *,
    realtime: bool = False,
    seed: int | None = None,
) -> dict[str, SimulatedInstrument]:
    """One instrument per role of ``dialects`` (role -> dialect), sharing one lock.

    Raises
    ------
    ValueError
        A dialect is unknown or does not fit its role.
    """
    dialects = dict(DEFAULT_DIALECTS if dialects is None else dialects)
    lock = threading.RLock()
    instruments = {}
    for role, dialect in dialects.items():
        instrument = make_instrument(dialect, bench, lock=lock, realtime=realtime, seed=seed)
        if instrument.role != role:
            raise ValueError(f"dialect {dialect!r} is a {instrument.role}, not a {role}")
        instruments[role] = instrument
    return instruments


__all__ = [
    "DEFAULT_DIALECTS",
    "DIALECTS",
    "ROLE_DIALECTS",
    "BlockScope",
    "OutputTreeGenerator",
    "RelayBox",
    "SimulatedInstrument",
    "SourceTreeGenerator",
    "TextScope",
    "make_instrument",
    "make_instruments",
]
