"""The simulated relay box (``switch-relay``): opens or closes the loop of the bench.

``ROUT:CLOS 1`` closes the loop (the circuit feeds itself), ``ROUT:OPEN 1`` opens it
(the generator drives it); ``ROUT:STAT? 1`` answers ``1`` closed, ``0`` open. The box
has one relay, number 1; a channel list ``(@1)`` is accepted too. ``*RST`` opens it.
"""

from __future__ import annotations

import re

from mock_instruments.scpi import CommandError, CommandTree, SimulatedInstrument, expect_args

_RELAY = re.compile(r"^\(?@?\s*(\d+)\s*\)?$")


class RelayBox(SimulatedInstrument):
    """``switch-relay``: one relay that opens or closes the loop."""

    role = "switch"
    dialect = "switch-relay"
    error_query = "SYSTem:ERRor"

    def define(self, tree: CommandTree) -> None:
        tree.add("ROUTe:CLOSe", command=self._close)
        tree.add("ROUTe:OPEN", command=self._open)
        tree.add("ROUTe:STATe", query=self._state)

    def reset_state(self) -> None:
        self.bench.set_loop_closed(False)

    def _relay(self, args: list[str]) -> int:
        (text,) = expect_args(args, 1)
        match = _RELAY.match(text)
        if match is None:
            raise CommandError(-224, f"expected relay number 1, got {text[:40]!r}")
        if int(match.group(1)) != 1:
            raise CommandError(-222, f"no relay {match.group(1)}; this box has relay 1")
        return 1

    def _close(self, s: tuple[int, ...], a: list[str]) -> None:
        self._relay(a)
        self.bench.set_loop_closed(True)

    def _open(self, s: tuple[int, ...], a: list[str]) -> None:
        self._relay(a)
        self.bench.set_loop_closed(False)

    def _state(self, s: tuple[int, ...], a: list[str]) -> str:
        self._relay(a)
        return "1" if self.bench.loop_closed else "0"
