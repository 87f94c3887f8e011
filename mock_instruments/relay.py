"""The simulated relay box (``switch-relay``): opens or closes the loop, joins the probes.

Relay 1 closes the loop: ``ROUT:CLOS 1`` (the circuit feeds itself), ``ROUT:OPEN 1``
(the generator drives it). Relay 2 joins the probes: ``ROUT:CLOS 2`` puts channel 2's
probe on channel 1's node (for a channel calibration), ``ROUT:OPEN 2`` puts it back.
``ROUT:STAT? n`` answers ``1`` closed, ``0`` open. A channel list ``(@n)`` is accepted
too. ``*RST`` opens both.
"""

from __future__ import annotations

import re

from mock_instruments.scpi import CommandError, CommandTree, SimulatedInstrument, expect_args

_RELAY = re.compile(r"^\(?@?\s*(\d+)\s*\)?$")
#: Relay numbers: 1 closes the loop, 2 joins the probes.
LOOP_RELAY = 1
PROBE_RELAY = 2


class RelayBox(SimulatedInstrument):
    """``switch-relay``: relay 1 opens or closes the loop, relay 2 joins the probes.

    Attributes
    ----------
    closings
        Relay number -> how many ``ROUT:CLOS`` it received (tests count operations).
    """

    role = "switch"
    dialect = "switch-relay"
    error_query = "SYSTem:ERRor"

    def define(self, tree: CommandTree) -> None:
        self.closings = {LOOP_RELAY: 0, PROBE_RELAY: 0}
        tree.add("ROUTe:CLOSe", command=self._close)
        tree.add("ROUTe:OPEN", command=self._open)
        tree.add("ROUTe:STATe", query=self._state)

    def reset_state(self) -> None:
        self.bench.set_loop_closed(False)
        self.bench.set_probes_joined(False)

    def _relay(self, args: list[str]) -> int:
        (text,) = expect_args(args, 1)
        match = _RELAY.match(text)
        if match is None:
            raise CommandError(-224, f"expected relay number 1 or 2, got {text[:40]!r}")
        number = int(match.group(1))
        if number not in (LOOP_RELAY, PROBE_RELAY):
            raise CommandError(-222, f"no relay {number}; this box has relays 1 and 2")
        return number

    def _set(self, number: int, closed: bool) -> None:
        if number == LOOP_RELAY:
            self.bench.set_loop_closed(closed)
        else:
            self.bench.set_probes_joined(closed)

    def _close(self, s: tuple[int, ...], a: list[str]) -> None:
        number = self._relay(a)
        self.closings[number] += 1
        self._set(number, True)

    def _open(self, s: tuple[int, ...], a: list[str]) -> None:
        self._set(self._relay(a), False)

    def _state(self, s: tuple[int, ...], a: list[str]) -> str:
        number = self._relay(a)
        closed = self.bench.loop_closed if number == LOOP_RELAY else self.bench.probes_joined
        return "1" if closed else "0"
