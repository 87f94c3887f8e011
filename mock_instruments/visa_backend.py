"""An in-process pyvisa backend that talks to simulated instruments without sockets.

``pyvisa.ResourceManager(InProcessBackend(bench))`` gives real
``MessageBasedResource`` objects (``query``, ``query_binary_values``, ``read_bytes``
all work) whose writes go straight to the instruments' ``respond`` model. It mimics
pyvisa-py's raw-socket sessions where drivers could notice the difference:

- no end-of-message: without a read termination a read waits for ``count`` bytes
  or the timeout, as on a SOCKET resource;
- a reply that comes later than the timeout raises ``VisaIOError`` (VI_ERROR_TMO)
  and is returned by the next read (stale data) unless ``clear()`` runs first;
- a dropped connection raises ``VisaIOError`` (VI_ERROR_CONN_LOST) on the next
  read or write (pyvisa-py would first spin until the timeout).

Resource names look like ``TCPIP0::inprocess-3::2::SOCKET`` so that code choosing
terminations by resource type treats them as sockets; only this backend opens them.
Each backend instance has its own library path, since pyvisa caches backend objects
per (class, path).
"""

from __future__ import annotations

import itertools
import threading
import time
from collections import deque
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

from pyvisa import attributes, constants, highlevel
from pyvisa.constants import StatusCode
from pyvisa.util import LibraryPath

from mock_instruments.instruments import make_instruments
from mock_instruments.scpi import SimulatedInstrument

_REGISTRY: dict[str, dict[str, SimulatedInstrument]] = {}
_COUNTER = itertools.count(1)
_REGISTRY_LOCK = threading.Lock()


class InProcessBench:
    """Simulated instruments of one bench, reachable through :class:`InProcessBackend`.

    Parameters
    ----------
    bench
        The simulated bench.
    dialects
        role -> dialect (default: ``mock_instruments.instruments.DEFAULT_DIALECTS``).
    realtime
        Acquisitions take their real duration.
    seed
        Seed of the fault hooks' random garbage.

    Attributes
    ----------
    name
        Unique name; also the backend's library path.
    instruments
        role -> simulated instrument.
    resources
        role -> resource name for this backend.
    """

    def __init__(
        self,
        bench: Any,
        dialects: dict[str, str] | None = None,
        *,
        realtime: bool = False,
        seed: int | None = None,
    ) -> None:
        self.bench = bench
        self.instruments = make_instruments(bench, dialects, realtime=realtime, seed=seed)
        self.name = f"inprocess-{next(_COUNTER)}"
        self.resources: dict[str, str] = {}
        by_resource = {}
        for k, (role, instrument) in enumerate(self.instruments.items(), start=1):
            resource = f"TCPIP0::{self.name}::{k}::SOCKET"
            instrument.serial = f"{self.name}-{role}"
            self.resources[role] = resource
            by_resource[resource] = instrument
        with _REGISTRY_LOCK:
            _REGISTRY[self.name] = by_resource
        self._backend: InProcessBackend | None = None

    @property
    def backend(self) -> InProcessBackend:
        """The pyvisa backend object for this bench (one per bench)."""
        if self._backend is None:
            self._backend = InProcessBackend(self)
        return self._backend

    def resource_manager(self) -> Any:
        """A ``pyvisa.ResourceManager`` on this bench's backend."""
        import pyvisa

        return pyvisa.ResourceManager(self.backend)

    def close(self) -> None:
        """Close the resource manager (and its sessions) and forget the instruments."""
        if self._backend is not None:
            if self._backend.resource_manager is not None:
                self._backend.resource_manager.close()
            # Forget pyvisa's cached backend object too (one per library path).
            highlevel.VisaLibraryBase._registry.pop(
                (InProcessBackend, self._backend.library_path), None
            )
        with _REGISTRY_LOCK:
            _REGISTRY.pop(self.name, None)

    def __enter__(self) -> InProcessBench:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


@dataclass
class _Session:
    instrument: SimulatedInstrument
    resource_name: str
    attrs: dict[int, Any] = field(default_factory=dict)
    incoming: bytearray = field(default_factory=bytearray)
    pending: bytearray = field(default_factory=bytearray)
    # (clock time the bytes arrive, bytes), in arrival order
    late: deque[tuple[float, bytes]] = field(default_factory=deque)
    dropped: bool = False


class InProcessBackend(highlevel.VisaLibraryBase):
    """A pyvisa backend (``VisaLibraryBase``) over in-process simulated instruments.

    Parameters
    ----------
    target
        An :class:`InProcessBench`, or the name of one (the library path).
    """

    def __new__(cls, target: InProcessBench | str | LibraryPath = "") -> InProcessBackend:
        path = target.name if isinstance(target, InProcessBench) else target
        return super().__new__(cls, path)  # type: ignore[return-value]

    def __init__(self, target: InProcessBench | str | LibraryPath = "") -> None:
        # All set up in _init (called once by VisaLibraryBase.__new__).
        pass

    @staticmethod
    def get_library_paths() -> Iterable[LibraryPath]:
        # pyvisa needs at least one path; a bench created here has its own.
        return (LibraryPath("inprocess-default"),)

    @staticmethod
    def get_debug_info() -> list[str]:
        return ["loopwright in-process simulated instruments"]

    def _init(self) -> None:
        self._instruments = _REGISTRY.get(str(self.library_path), {})
        self._sessions: dict[int, _Session] = {}
        self._session_ids = itertools.count(1000)
        self._rm_session: int | None = None

    # -- resource manager -------------------------------------------------------------

    def open_default_resource_manager(self) -> tuple[int, StatusCode]:
        self._rm_session = next(self._session_ids)
        return self._rm_session, StatusCode.success

    def list_resources(self, session: int, query: str = "?*::INSTR") -> tuple[str, ...]:
        return tuple(self._instruments)

    def open(
        self,
        session: int,
        resource_name: str,
        access_mode: constants.AccessModes = constants.AccessModes.no_lock,
        open_timeout: int = constants.VI_TMO_IMMEDIATE,
    ) -> tuple[int, StatusCode]:
        instrument = self._instruments.get(resource_name)
        if instrument is None:
            return 0, self.handle_return_value(None, StatusCode.error_resource_not_found)
        new = next(self._session_ids)
        self._sessions[new] = _Session(instrument, resource_name)
        instrument.faults.on_connect()
        return new, StatusCode.success

    def close(self, session: int) -> StatusCode:
        if session == self._rm_session:
            self._sessions.clear()
            self._rm_session = None
        else:
            self._sessions.pop(session, None)
        return StatusCode.success

    # -- attributes -------------------------------------------------------------------

    def get_attribute(self, session: int, attribute: Any) -> tuple[Any, StatusCode]:
        state = self._session(session)
        if attribute in state.attrs:
            return state.attrs[attribute], StatusCode.success
        known = attributes.AttributesByID.get(attribute)
        if known is None:
            return 0, self.handle_return_value(session, StatusCode.error_nonsupported_attribute)
        return known.default, StatusCode.success

    def set_attribute(self, session: int, attribute: Any, attribute_state: Any) -> StatusCode:
        self._session(session).attrs[attribute] = attribute_state
        return StatusCode.success

    # -- I/O --------------------------------------------------------------------------

    def write(self, session: int, data: bytes) -> tuple[int, StatusCode]:
        state = self._session(session)
        self._check_connected(session, state)
        state.incoming.extend(data)
        while b"\n" in state.incoming:
            end = state.incoming.index(b"\n")
            line = bytes(state.incoming[:end]).decode("latin-1").rstrip("\r")
            del state.incoming[: end + 1]
            if not line.strip():
                continue
            outcome = state.instrument.respond(line)
            if outcome.drop:
                state.dropped = True
                state.pending.clear()
                state.late.clear()
                break
            if outcome.reply is not None:
                previous = state.late[-1][0] if state.late else 0.0
                arrival = max(previous, time.monotonic() + outcome.delay_s)
                state.late.append((arrival, outcome.reply))
        return len(data), StatusCode.success

    def read(self, session: int, count: int) -> tuple[bytes, StatusCode]:
        state = self._session(session)
        timeout_ms = self._attr(state, constants.VI_ATTR_TMO_VALUE)
        deadline = (
            None
            if timeout_ms == constants.VI_TMO_INFINITE
            else (time.monotonic() + timeout_ms / 1000.0)
        )
        term_enabled = bool(self._attr(state, constants.VI_ATTR_TERMCHAR_EN))
        term = bytes([self._attr(state, constants.VI_ATTR_TERMCHAR)])
        while True:
            now = time.monotonic()
            while state.late and state.late[0][0] <= now:
                state.pending.extend(state.late.popleft()[1])
            if term_enabled and term in state.pending:
                end = state.pending.index(term) + 1
                status = StatusCode.success_termination_character_read
                if end > count:
                    end, status = count, StatusCode.success_max_count_read
                out = bytes(state.pending[:end])
                del state.pending[:end]
                return out, status
            if len(state.pending) >= count:
                out = bytes(state.pending[:count])
                del state.pending[:count]
                return out, StatusCode.success_max_count_read
            self._check_connected(session, state)
            next_arrival = state.late[0][0] if state.late else None
            if deadline is not None and (next_arrival is None or next_arrival > deadline):
                time.sleep(max(0.0, deadline - now))
                # Like pyvisa-py: what arrived so far is discarded with the timeout.
                del state.pending[:count]
                return b"", self.handle_return_value(session, StatusCode.error_timeout)
            if next_arrival is None:  # infinite timeout and nothing will ever come
                time.sleep(0.05)
                continue
            time.sleep(max(0.0, next_arrival - now))

    def clear(self, session: int) -> StatusCode:
        state = self._session(session)
        self._check_connected(session, state)
        state.pending.clear()
        state.late.clear()
        state.incoming.clear()
        return StatusCode.success

    def flush(self, session: int, mask: constants.BufferOperation) -> StatusCode:
        state = self._session(session)
        if mask & constants.BufferOperation.discard_read_buffer:
            state.pending.clear()
        return StatusCode.success

    def read_stb(self, session: int) -> tuple[int, StatusCode]:
        return 0, StatusCode.success

    def disable_event(self, session: int, event_type: Any, mechanism: Any) -> StatusCode:
        return StatusCode.success

    def discard_events(self, session: int, event_type: Any, mechanism: Any) -> StatusCode:
        return StatusCode.success

    # -- helpers ----------------------------------------------------------------------

    def _session(self, session: int) -> _Session:
        state = self._sessions.get(session)
        if state is None:
            self.handle_return_value(session, StatusCode.error_invalid_object)
            raise AssertionError("unreachable")  # handle_return_value raised
        return state

    def _attr(self, state: _Session, attribute: int) -> Any:
        if attribute in state.attrs:
            return state.attrs[attribute]
        return attributes.AttributesByID[attribute].default

    def _check_connected(self, session: int, state: _Session) -> None:
        if state.dropped:
            self.handle_return_value(session, StatusCode.error_connection_lost)
