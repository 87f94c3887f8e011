"""The SCPI machinery shared by every simulated instrument.

A simulated instrument is a function from one received line to one reply
(:meth:`SimulatedInstrument.handle`). This module gives it:

- a command tree with SCPI keyword matching: ``FREQuency`` matches ``FREQ`` and
  ``FREQUENCY`` in any case; a ``#`` marks a numeric suffix (``SOURce#`` matches
  ``SOUR``, ``SOUR1``, ``SOURCE2``; no suffix means 1);
- program messages of several units separated by ``;``; a unit without a leading
  ``:`` may be relative to the previous unit's path (``TIM:POIN 1000;SRAT 1e6``),
  as in SCPI-99 (mem) section 6.2.4; common commands (``*...``) do not change the path;
- the IEEE 488.2 common commands ``*IDN? *RST *CLS *OPC *OPC? *ESR?``;
- an error queue read as ``<code>,"<text>"`` (``0,"No error"`` when empty) with the
  Standard Event Status Register bits of IEEE 488.2 (mem: bit 5 command error, bit 4
  execution error, bit 3 device-dependent error, bit 2 query error, bit 0 operation
  complete).

Error codes (SCPI-99 (mem), chapter 21): -100 command error, -102 syntax error,
-104 data type error, -108 parameter not allowed, -109 missing parameter, -113
undefined header, -114 header suffix out of range, -222 data out of range, -224
illegal parameter value, -230 data corrupt or stale, -350 queue overflow.
As IEEE 488.2 (mem) asks, the rest of a message after a command error is discarded.
"""

from __future__ import annotations

import math
import re
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar

from mock_instruments.faults import Execution, Faults, Outcome

ERROR_TEXTS: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -200: "Execution error",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -350: "Queue overflow",
    -410: "Query INTERRUPTED",
}

# Standard Event Status Register bits (IEEE 488.2 (mem)).
ESR_OPERATION_COMPLETE = 1 << 0
ESR_QUERY_ERROR = 1 << 2
ESR_DEVICE_ERROR = 1 << 3
ESR_EXECUTION_ERROR = 1 << 4
ESR_COMMAND_ERROR = 1 << 5

_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_HEADER = re.compile(r"^(\*[A-Za-z]+\??|:?[A-Za-z][A-Za-z0-9_]*(:[A-Za-z][A-Za-z0-9_]*)*\??)$")
_TOKEN = re.compile(r"^([A-Za-z_]*[A-Za-z_])(\d*)$")


class CommandError(Exception):
    """Raised by a command handler: goes on the error queue, never to the client."""

    def __init__(self, code: int, detail: str = "") -> None:
        self.code = code
        self.detail = detail
        super().__init__(f"{code} {detail}")


def format_number(value: float) -> str:
    """A float as the shortest decimal that reads back to the same value."""
    value = float(value)
    if value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(value)


def parse_number(text: str) -> float:
    """An SCPI decimal numeric parameter (plain or E-notation) -> float, else -104."""
    if not _NUMBER.match(text):
        raise CommandError(-104, f"not a number: {text[:40]!r}")
    return float(text)


def parse_integer(text: str) -> int:
    """A whole number (``1000``, ``1e3``, ``1000.0``) -> int, else -104/-224."""
    value = parse_number(text)
    if not value.is_integer():
        raise CommandError(-224, f"not a whole number: {text!r}")
    return int(value)


def parse_bool(text: str) -> bool:
    """``ON|OFF|1|0`` -> bool, else -224."""
    word = text.upper()
    if word in ("ON", "1"):
        return True
    if word in ("OFF", "0"):
        return False
    raise CommandError(-224, f"expected ON|OFF|1|0, got {text[:40]!r}")


def parse_choice(text: str, choices: dict[str, str]) -> str:
    """A word of a fixed set (keyword patterns -> value), else -224."""
    for pattern, value in choices.items():
        if keyword_matches(pattern, text):
            return value
    allowed = "|".join(choices)
    raise CommandError(-224, f"expected {allowed}, got {text[:40]!r}")


def parse_suffixed_word(text: str, pattern: str, count: int) -> int:
    """A word like ``CHAN2`` / ``INP1`` (``pattern`` with a suffix 1..count) -> 2 / 1."""
    match = _TOKEN.match(text)
    if match is None or not keyword_matches(pattern, match.group(1)):
        raise CommandError(-224, f"expected {pattern.upper()}1..{count}, got {text[:40]!r}")
    number = int(match.group(2) or 1)
    if not 1 <= number <= count:
        raise CommandError(-224, f"no {pattern.upper()}{number}; 1..{count}")
    return number


def keyword_matches(pattern: str, word: str) -> bool:
    """SCPI keyword match: the short form (the capitals of ``pattern``) or the long one."""
    short = "".join(ch for ch in pattern if not ch.islower())
    word = word.upper()
    return word == short.upper() or word == pattern.upper()


def expect_args(args: list[str], count: int) -> list[str]:
    """Exactly ``count`` parameters, else -109 (too few) or -108 (too many)."""
    if len(args) < count:
        raise CommandError(-109, f"expected {count} parameter(s)")
    if len(args) > count:
        raise CommandError(-108, f"expected {count} parameter(s), got {len(args)}")
    return args


def check_range(value: float, low: float, high: float, what: str, unit: str) -> float:
    """``value`` within ``[low, high]``, else -222 naming the limits."""
    if not low <= value <= high:
        raise CommandError(
            -222, f"{what} {format_number(value)} {unit} outside {low:g} to {high:g} {unit}"
        )
    return value


Handler = Callable[[tuple[int, ...], list[str]], Any]


@dataclass
class _Node:
    pattern: tuple[str, ...]
    command: Handler | None = None
    query: Handler | None = None


class CommandTree:
    """Headers of one dialect and their handlers.

    A handler takes the header's numeric suffixes and the parameter strings. A command
    handler returns None; a query handler returns ``str`` or ``bytes`` (the reply
    without its terminator).
    """

    def __init__(self) -> None:
        self._nodes: list[_Node] = []

    def add(
        self, pattern: str, *, command: Handler | None = None, query: Handler | None = None
    ) -> None:
        """Register ``pattern`` (``SOURce#:FREQuency``) with its command and/or query."""
        self._nodes.append(_Node(tuple(pattern.split(":")), command, query))

    def find(self, tokens: list[str]) -> tuple[_Node, tuple[int, ...]] | None:
        """The node whose pattern matches ``tokens`` and the suffixes given."""
        for node in self._nodes:
            if len(node.pattern) != len(tokens):
                continue
            suffixes = []
            for pattern, token in zip(node.pattern, tokens, strict=True):
                match = _TOKEN.match(token)
                if match is None:
                    break
                word, digits = match.groups()
                takes_suffix = pattern.endswith("#")
                if not keyword_matches(pattern.rstrip("#"), word):
                    break
                if digits and not takes_suffix:
                    break
                if takes_suffix:
                    suffixes.append(int(digits) if digits else 1)
            else:
                return node, tuple(suffixes)
        return None


def split_units(message: str) -> list[str]:
    """Split a program message at ``;`` outside quoted strings."""
    units, current, quote = [], [], ""
    for ch in message:
        if quote:
            current.append(ch)
            if ch == quote:
                quote = ""
        elif ch in "\"'":
            quote = ch
            current.append(ch)
        elif ch == ";":
            units.append("".join(current))
            current = []
        else:
            current.append(ch)
    if quote:
        raise CommandError(-102, "unterminated string")
    units.append("".join(current))
    return [u.strip() for u in units]


def split_params(text: str) -> list[str]:
    """Parameters separated by commas (strings keep their quotes off)."""
    text = text.strip()
    if not text:
        return []
    params = [p.strip() for p in text.split(",")]
    if any(p == "" for p in params):
        raise CommandError(-102, "empty parameter")
    return [p[1:-1] if len(p) >= 2 and p[0] == p[-1] and p[0] in "\"'" else p for p in params]


class ErrorQueue:
    """The SCPI error queue: first in, first out; the newest entry becomes -350 when full.

    Parameters
    ----------
    capacity
        Entries kept (SCPI asks for at least two; 10 here).
    on_error
        Called with each code pushed (the instrument sets its event register bits).
    """

    def __init__(self, capacity: int = 10, on_error: Callable[[int], None] | None = None) -> None:
        self.capacity = capacity
        self._entries: deque[tuple[int, str]] = deque()
        self._on_error = on_error
        self._lock = threading.Lock()

    def push(self, code: int, detail: str = "", *, text: str | None = None) -> None:
        """Add an error; ``detail`` follows the standard text after a ``;``.

        ``text`` replaces the whole text (an injected error says exactly what it is told).
        """
        if text is None:
            text = ERROR_TEXTS.get(code, "Device-specific error")
            if detail:
                text = f"{text}; {detail}"
        # Printable ASCII only: the text is echoed to clients, whatever they sent.
        text = "".join(ch if " " <= ch <= "~" and ch != '"' else "?" for ch in text)
        with self._lock:
            if len(self._entries) >= self.capacity:
                self._entries[-1] = (-350, ERROR_TEXTS[-350])
            else:
                self._entries.append((code, text))
        if self._on_error is not None:
            self._on_error(code)

    def pop(self) -> str:
        """The oldest entry as ``<code>,"<text>"``; ``0,"No error"`` when empty."""
        with self._lock:
            code, text = self._entries.popleft() if self._entries else (0, ERROR_TEXTS[0])
        return f'{code},"{text}"'

    def clear(self) -> None:
        """Empty the queue (``*CLS``)."""
        with self._lock:
            self._entries.clear()

    def __len__(self) -> int:
        return len(self._entries)

    def codes(self) -> list[int]:
        """The codes waiting, oldest first (for tests; the queue is left as is)."""
        with self._lock:
            return [code for code, _ in self._entries]


class SimulatedInstrument:
    """Base of the simulated instruments: common commands, error queue, faults.

    Parameters
    ----------
    bench
        The :class:`~mock_instruments.bench.SimulatedBench` the instrument acts on.
    serial
        Goes into ``*IDN?`` as ``SIM-<serial>`` (the TCP port, or a name).
    lock
        A lock shared by all instruments of one bench (one may be made here).
    realtime
        When True, operations that take time on hardware (acquisitions) take it here.
    clock
        Monotonic seconds; tests may pass their own.
    seed
        Seed of the fault hooks' random garbage.

    Subclasses set :attr:`role` and :attr:`dialect`, register their headers in
    :meth:`define` and restore their defaults in :meth:`reset_state`.
    """

    role: ClassVar[str] = ""
    dialect: ClassVar[str] = ""
    #: The dialect's error query header.
    error_query: ClassVar[str] = "SYSTem:ERRor"

    def __init__(
        self,
        bench: Any,
        *,
        serial: str = "0",
        lock: threading.RLock | None = None,
        realtime: bool = False,
        clock: Callable[[], float] = time.monotonic,
        seed: int | None = None,
    ) -> None:
        self.bench = bench
        self.serial = serial
        self.lock = lock if lock is not None else threading.RLock()
        self.realtime = realtime
        self.clock = clock
        #: Added to every reply's delay: models a real instrument's query turnaround
        #: (a few ms on a LAN instrument, practice); 0 = as fast as the computation.
        self.query_latency_s = 0.0
        self.event_status = 0
        self._opc_pending = False
        self.errors = ErrorQueue(on_error=self._note_error)
        self.faults = Faults(
            push_error=lambda code, text: self.errors.push(code, text=text), seed=seed
        )
        self.tree = CommandTree()
        self.tree.add(self.error_query, query=lambda s, a: self.errors.pop())
        self.define(self.tree)
        with self.lock:
            self.reset_state()

    # -- to override ----------------------------------------------------------------

    def define(self, tree: CommandTree) -> None:
        """Register the dialect's headers."""

    def reset_state(self) -> None:
        """Restore the power-on settings (``*RST``)."""

    def operations_done_at(self) -> float:
        """Clock time when pending operations finish (``math.inf``: never)."""
        return -math.inf

    # -- identity -------------------------------------------------------------------

    @property
    def identity(self) -> str:
        """The ``*IDN?`` answer; it always says the instrument is simulated."""
        from loopwright import __version__

        return f"loopwright,simulated {self.role} ({self.dialect}),SIM-{self.serial},{__version__}"

    # -- the model ------------------------------------------------------------------

    def handle(self, command: str) -> bytes | None:
        """Execute one line, wait as the hardware would, return the reply or None.

        No fault hooks apply here; transports use :meth:`respond`.
        """
        reply, ready_s = self.execute(command)
        if reply is None or math.isinf(ready_s):
            return None
        if ready_s > 0:
            time.sleep(ready_s)
        return reply

    def query(self, command: str) -> str:
        """:meth:`handle` for Python callers: the reply as text without the terminator."""
        reply = self.handle(command)
        if reply is None:
            raise RuntimeError(f"{command!r} produced no reply")
        return reply.decode("latin-1").rstrip("\n")

    def respond(self, message: str) -> Outcome:
        """One line from a transport, fault hooks applied (never sleeps)."""
        return self.faults.process(message, self.execute)

    def execute(self, message: str) -> Execution:
        """Run every unit of ``message``; return the joined replies and their delay."""
        with self.lock:
            return self._execute_locked(message)

    def _execute_locked(self, message: str) -> Execution:
        replies: list[bytes] = []
        ready_s = 0.0
        try:
            units = split_units(message.strip())
        except CommandError as failure:
            self.errors.push(failure.code, failure.detail)
            return None, 0.0
        path: list[str] = []
        for unit in units:
            if not unit:
                if len(units) > 1:
                    self.errors.push(-102, "empty command")
                    break
                continue
            try:
                reply, delay_s, path = self._execute_unit(unit, path)
            except CommandError as failure:
                where = unit[:60]
                self.errors.push(
                    failure.code, f"{failure.detail} in {where}" if failure.detail else where
                )
                if -199 <= failure.code <= -100:
                    break
                continue
            if reply is not None:
                replies.append(reply)
                ready_s = max(ready_s, delay_s)
        if not replies:
            return None, 0.0
        return b";".join(replies) + b"\n", ready_s + self.query_latency_s

    def _execute_unit(self, unit: str, path: list[str]) -> tuple[bytes | None, float, list[str]]:
        head, _, rest = unit.partition(" ")
        if "\t" in head:
            head, _, more = head.partition("\t")
            rest = f"{more} {rest}"
        if not _HEADER.match(head):
            raise CommandError(-102, f"bad header {head[:40]!r}")
        args = split_params(rest)
        is_query = head.endswith("?")
        name = head.rstrip("?")
        if name.startswith("*"):
            reply, delay_s = self._common(name.upper(), is_query, args)
            return reply, delay_s, path
        absolute = name.startswith(":")
        tokens = name.lstrip(":").split(":")
        candidates = [tokens] if absolute or not path else [path + tokens, tokens]
        found = None
        for candidate in candidates:
            found = self.tree.find(candidate)
            if found is not None:
                tokens = candidate
                break
        if found is None:
            raise CommandError(-113, "")
        node, suffixes = found
        handler = node.query if is_query else node.command
        if handler is None:
            raise CommandError(-113, "query only" if node.query else "no query form")
        result = handler(suffixes, args)
        new_path = tokens[:-1]
        if not is_query:
            return None, 0.0, new_path
        if isinstance(result, tuple):
            result, delay_s = result
        else:
            delay_s = 0.0
        data = result if isinstance(result, bytes) else str(result).encode("latin-1")
        return data, delay_s, new_path

    def _common(self, name: str, is_query: bool, args: list[str]) -> tuple[bytes | None, float]:
        expect_args(args, 0)
        if name == "*IDN" and is_query:
            return self.identity.encode("latin-1"), 0.0
        if name == "*RST" and not is_query:
            self.reset_state()
            return None, 0.0
        if name == "*CLS" and not is_query:
            self.errors.clear()
            self.event_status = 0
            self._opc_pending = False
            return None, 0.0
        if name == "*OPC":
            done_at = self.operations_done_at()
            wait_s = max(0.0, done_at - self.clock())
            if is_query:
                return b"1", wait_s
            if wait_s == 0.0:
                self.event_status |= ESR_OPERATION_COMPLETE
            else:
                self._opc_pending = True
            return None, 0.0
        if name == "*ESR" and is_query:
            if self._opc_pending and self.operations_done_at() <= self.clock():
                self._opc_pending = False
                self.event_status |= ESR_OPERATION_COMPLETE
            value, self.event_status = self.event_status, 0
            return str(value).encode(), 0.0
        raise CommandError(-113, "")

    def _note_error(self, code: int) -> None:
        if -199 <= code <= -100:
            self.event_status |= ESR_COMMAND_ERROR
        elif -299 <= code <= -200:
            self.event_status |= ESR_EXECUTION_ERROR
        elif -399 <= code <= -300 or code > 0:
            self.event_status |= ESR_DEVICE_ERROR
        elif -499 <= code <= -400:
            self.event_status |= ESR_QUERY_ERROR
