"""Fault hooks of a simulated instrument, for the reliability work.

Every simulated instrument owns one :class:`Faults` object (``instrument.faults``).
A test or a script arms a fault from Python; the transports (the TCP server and the
in-process pyvisa backend) ask :meth:`Faults.process` what to do with each incoming
message and act on the :class:`Outcome` (send late, send garbage, drop the
connection, or send nothing).

Counting: a *message* is one line received (it may hold several ``;``-separated
commands); a *query* is a message that produces a reply. ``at_message=1`` and
``at_query=1`` mean the next one after arming. Faults stay armed until they fire
(one-shot ones) or until :meth:`Faults.clear`.

Example
-------
>>> faults = Faults()
>>> faults.delay_reply(0.5, at_query=2)   # the second reply from now comes 0.5 s late
>>> faults.drop_connection(at_message=5)  # the fifth message closes the connection
>>> faults.refuse_amplitude_above(1.0)    # amplitudes above 1 Vpp fail with -222
>>> faults.clear()
"""

from __future__ import annotations

import math
import random
import threading
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

GarbageKind = Literal["random", "truncated"]


@dataclass(frozen=True)
class Outcome:
    """What a transport does with one message.

    Attributes
    ----------
    reply
        Bytes to send (already ending in ``\\n`` unless garbled), or None for no reply.
    delay_s
        Seconds to wait before sending ``reply``.
    drop
        Close the connection instead of answering (nothing is sent).
    """

    reply: bytes | None = None
    delay_s: float = 0.0
    drop: bool = False


#: The model's answer to one message: reply bytes (or None) and the delay before they
#: are ready (``math.inf``: never, e.g. ``*OPC?`` on an acquisition that never ends).
Execution = tuple[bytes | None, float]


class Faults:
    """The fault plan of one simulated instrument (thread-safe).

    Parameters
    ----------
    push_error
        Puts an error on the owning instrument's SCPI queue (``code, text``).
    seed
        Seed of the random garbage bytes.
    """

    def __init__(
        self,
        push_error: Callable[[int, str], None] | None = None,
        seed: int | None = None,
    ) -> None:
        self._push_error = push_error
        self._lock = threading.Lock()
        self._random = random.Random(seed)
        self.messages_seen = 0
        self.queries_seen = 0
        self.clear()

    # -- arming -------------------------------------------------------------------

    def clear(self) -> None:
        """Disarm every fault and release a stopped instrument."""
        with self._lock:
            self._drop_at: int | None = None
            self._delay_s = 0.0
            self._delay_at: int | None = None
            self._delay_all = False
            self._garbage_at: int | None = None
            self._garbage_kind: GarbageKind = "random"
            self._hang_at: int | None = None
            self._hanging = False
            self._hang_until_reconnect = False
            self.amplitude_limit_vpp: float | None = None
            self.acquisition_never_completes = False

    def drop_connection(self, at_message: int = 1) -> None:
        """Close the connection on the ``at_message``-th message from now (not executed)."""
        with self._lock:
            self._drop_at = self.messages_seen + _positive(at_message, "at_message")

    def delay_reply(self, delay_s: float, at_query: int | None = None) -> None:
        """Answer ``delay_s`` late: on the ``at_query``-th query from now, or on all (None)."""
        if not delay_s >= 0 or math.isinf(delay_s):
            raise ValueError(f"delay_s must be finite and >= 0, got {delay_s!r}")
        with self._lock:
            self._delay_s = float(delay_s)
            self._delay_all = at_query is None
            self._delay_at = (
                None if at_query is None else self.queries_seen + _positive(at_query, "at_query")
            )

    def garbage_reply(self, at_query: int = 1, kind: GarbageKind = "random") -> None:
        """Garble the ``at_query``-th reply from now.

        ``kind="random"``: random bytes as long as the reply, ending in ``\\n``;
        ``kind="truncated"``: the first half of the reply and no terminator (a block
        that never completes).
        """
        if kind not in ("random", "truncated"):
            raise ValueError(f"kind must be 'random' or 'truncated', got {kind!r}")
        with self._lock:
            self._garbage_at = self.queries_seen + _positive(at_query, "at_query")
            self._garbage_kind = kind

    def stop_answering(self, at_message: int = 1, until_reconnect: bool = False) -> None:
        """From the ``at_message``-th message on, execute nothing and answer nothing.

        The instrument stays silent until :meth:`clear` (or, with ``until_reconnect``,
        until a client opens a new connection).
        """
        with self._lock:
            self._hang_at = self.messages_seen + _positive(at_message, "at_message")
            self._hang_until_reconnect = until_reconnect

    def push_error(self, code: int, text: str = "Injected error") -> None:
        """Put an error on the instrument's SCPI error queue now."""
        if self._push_error is None:
            raise RuntimeError("these faults are not attached to an instrument")
        self._push_error(int(code), text)

    def refuse_amplitude_above(self, amplitude_vpp: float | None) -> None:
        """Refuse amplitudes above ``amplitude_vpp`` with -222 (None: no extra limit)."""
        with self._lock:
            self.amplitude_limit_vpp = None if amplitude_vpp is None else float(amplitude_vpp)

    def never_complete_acquisition(self, enabled: bool = True) -> None:
        """Acquisitions started from now on never finish (``*OPC?`` stays silent)."""
        with self._lock:
            self.acquisition_never_completes = bool(enabled)

    # -- consulted by the transports ----------------------------------------------

    @property
    def hanging(self) -> bool:
        """True while the instrument has stopped answering."""
        return self._hanging

    def on_connect(self) -> None:
        """A client opened a connection (releases a stop armed ``until_reconnect``)."""
        with self._lock:
            if self._hanging and self._hang_until_reconnect:
                self._hanging = False

    def process(self, message: str, execute: Callable[[str], Execution]) -> Outcome:
        """Run ``message`` through ``execute`` with the armed faults applied."""
        with self._lock:
            self.messages_seen += 1
            n = self.messages_seen
            if self._hang_at is not None and n >= self._hang_at:
                self._hang_at = None
                self._hanging = True
            if self._hanging:
                return Outcome()
            if self._drop_at is not None and n >= self._drop_at:
                self._drop_at = None
                return Outcome(drop=True)
        reply, ready_s = execute(message)
        if reply is None or math.isinf(ready_s):
            return Outcome()
        with self._lock:
            self.queries_seen += 1
            q = self.queries_seen
            delay_s = ready_s
            if self._delay_all or (self._delay_at is not None and q >= self._delay_at):
                delay_s += self._delay_s
                self._delay_at = None
            if self._garbage_at is not None and q >= self._garbage_at:
                self._garbage_at = None
                reply = self._garble(reply, self._garbage_kind)
        return Outcome(reply=reply, delay_s=delay_s)

    def _garble(self, reply: bytes, kind: GarbageKind) -> bytes:
        if kind == "truncated":
            return reply[: max(1, (len(reply) - 1) // 2)]
        # Any byte but the terminator, so the client reads one line of nonsense.
        body = self._random.randbytes(max(1, len(reply) - 1)).replace(b"\n", b"\x0b")
        return body + b"\n"


def _positive(value: int, name: str) -> int:
    if int(value) != value or value < 1:
        raise ValueError(f"{name} must be an integer >= 1, got {value!r}")
    return int(value)
