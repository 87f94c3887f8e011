"""One VISA session to one instrument: terminations, timeouts, errors, traffic log.

:class:`Session` wraps a pyvisa message-based resource and maps every foreign error
to ours at the boundary (``raise ... from exc``):

- a read timeout (``VisaIOError`` VI_ERROR_TMO) -> :class:`InstrumentTimeout`;
- ``OSError`` (refused, reset, broken pipe) and VISA connection errors ->
  :class:`ConnectionLost`;
- any other ``VisaIOError`` -> :class:`InstrumentError`.

Facts it is built on (measured with pyvisa-py, see the project notes): an open to a
dead port succeeds, so :meth:`Session.open` asks ``*IDN?`` at once; a late reply
after a timeout would be taken as the next answer, so the next exchange after a
timeout first resynchronises (:meth:`Session.clear`); pyvisa's own ``clear()`` never
returns on a socket the peer has closed, so it is not used on sockets, and
:meth:`Session.reconnect` closes and reopens instead.
"""

from __future__ import annotations

import re
import socket
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from datetime import datetime, timezone
from pathlib import Path
from typing import IO, Any

import numpy as np
import pyvisa
from pyvisa.highlevel import VisaLibraryBase

from loopwright.errors import (
    ConnectionLost,
    InputError,
    InstrumentError,
    InstrumentTimeout,
    SCPIError,
)
from loopwright.instruments.block import BlockFormatError, payload_to_samples, read_block

#: VI_ERROR_TMO: the VISA status code of a read timeout.
VISA_TIMEOUT_CODE = -1073807339
#: VISA status codes that mean the connection is gone or was never there.
VISA_CONNECTION_CODES = {
    -1073807194,  # VI_ERROR_CONN_LOST
    -1073807343,  # VI_ERROR_RSRC_NFOUND
    -1073807304,  # VI_ERROR_IO
    -1073807342,  # VI_ERROR_INV_RSRC_NAME
}
#: Errors read from the queue after one command before giving up (a full queue).
MAX_QUEUED_ERRORS = 32

_ERROR_REPLY = re.compile(r'^\s*([+-]?\d+)\s*,\s*"?(.*?)"?\s*$', re.DOTALL)

def parse_error_reply(reply: str) -> tuple[int, str]:
    """``-222,"Data out of range"`` -> ``(-222, "Data out of range")``.

    Raises
    ------
    InstrumentError
        The reply is not ``<code>,"<text>"``.
    """
    found = _ERROR_REPLY.match(reply)
    if not found:
        raise InstrumentError(f"the error query answered {reply!r}, not <code>,\"<text>\"")
    return int(found.group(1)), found.group(2)


class TrafficLog:
    """A timestamped log of SCPI traffic, one line per message.

    Each line is ``<ISO UTC time>\\t<resource>\\t<direction>\\t<text>`` with direction
    ``write``, ``read`` or ``note``; binary blocks are written as
    ``#<n bytes> block``. Lines are flushed as they are written, so a crash keeps
    everything up to the last message.

    Parameters
    ----------
    target
        A path (opened for appending) or a writable text file object (left open on
        :meth:`close`).
    """

    def __init__(self, target: str | Path | IO[str]) -> None:
        self._lock = threading.Lock()
        if isinstance(target, str | Path):
            self._file: IO[str] = open(target, "a", encoding="utf-8")  # noqa: SIM115
            self._owned = True
        else:
            self._file = target
            self._owned = False

    def record(self, resource: str, direction: str, text: str) -> None:
        """Append one line (control characters in ``text`` are escaped)."""
        stamp = datetime.now(timezone.utc).isoformat(timespec="microseconds")
        shown = text.replace("\\", "\\\\").replace("\n", "\\n").replace("\r", "\\r")
        shown = shown.replace("\t", "\\t")
        with self._lock:
            self._file.write(f"{stamp}\t{resource}\t{direction}\t{shown}\n")
            self._file.flush()

    def close(self) -> None:
        """Close the file if this log opened it."""
        if self._owned:
            self._file.close()


def as_traffic_log(target: TrafficLog | str | Path | IO[str] | None) -> TrafficLog | None:
    """A :class:`TrafficLog` for a path, file object or log; None stays None."""
    if target is None or isinstance(target, TrafficLog):
        return target
    return TrafficLog(target)


def _backend_session(resource: Any) -> Any:
    """pyvisa-py's own session object behind ``resource`` (None for other backends)."""
    sessions = getattr(getattr(resource, "visalib", None), "sessions", None)
    if not isinstance(sessions, dict):
        return None
    return sessions.get(getattr(resource, "session", None))


def _set_nodelay(resource: Any) -> None:
    """Switch Nagle off on a pyvisa-py socket (it does not expose the VISA attribute)."""
    sock = getattr(_backend_session(resource), "interface", None)
    if isinstance(sock, socket.socket):
        with suppress(OSError):
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


@contextmanager
def _large_receives(resource: Any, size: int = 1 << 20) -> Iterator[None]:
    """Let a pyvisa-py socket receive up to ``size`` bytes per call (it uses 4096).

    A 2 MB block in 4 kB receives costs about 500 loop turns in pyvisa-py; a large
    receive size makes it a handful. Other backends are left alone.
    """
    backend = _backend_session(resource)
    saved = getattr(backend, "max_recv_size", None)
    if not isinstance(saved, int) or saved >= size:
        yield
        return
    backend.max_recv_size = size
    try:
        yield
    finally:
        backend.max_recv_size = saved


def resource_manager(backend: str | VisaLibraryBase = "@py") -> pyvisa.ResourceManager:
    """The pyvisa resource manager of ``backend`` (one per VISA library, reused).

    Raises
    ------
    InstrumentError
        The VISA library cannot be loaded.
    """
    try:
        return pyvisa.ResourceManager(backend)
    except (OSError, ValueError, pyvisa.errors.Error) as exc:
        raise InstrumentError(
            f"cannot load the VISA backend {backend!r}: {exc}; '@py' (pyvisa-py) needs"
            " no vendor library") from exc


class Session:
    """One VISA session to one instrument.

    Parameters
    ----------
    resource
        VISA resource string, e.g. ``TCPIP0::127.0.0.1::5025::SOCKET``.
    backend
        A pyvisa backend string (``"@py"``, ``"@ivi"``, a library path) or a
        ``VisaLibraryBase`` instance (e.g. an in-process simulated backend).
    timeout_s
        Read timeout in seconds.
    traffic_log
        Where to log SCPI traffic: a :class:`TrafficLog`, a path or a text file; None
        for no log.
    error_query
        The query that pops the SCPI error queue (``SYST:ERR?``); None if the
        instrument has none (then :meth:`check_errors` does nothing).
    open_now
        Open (and ask ``*IDN?``) in the constructor.

    Attributes
    ----------
    identity
        The instrument's ``*IDN?`` answer, read on every (re)open.
    """

    def __init__(self, resource: str, *, backend: str | VisaLibraryBase = "@py",
                 timeout_s: float = 5.0,
                 traffic_log: TrafficLog | str | Path | IO[str] | None = None,
                 error_query: str | None = None, open_now: bool = True) -> None:
        self._resource: Any = None
        self.timeout_s = timeout_s  # checked by the setter before anything is opened
        self.resource_name = resource
        self.backend = backend
        self.error_query = error_query
        self.identity = ""
        self._log = as_traffic_log(traffic_log)
        self._owns_log = self._log is not None and not isinstance(traffic_log, TrafficLog)
        self._needs_sync = False
        if open_now:
            self.open()

    # ------------------------------------------------------------------ plumbing
    @property
    def is_socket(self) -> bool:
        """True for a raw TCP socket resource (``...::SOCKET``)."""
        return self.resource_name.upper().endswith("::SOCKET")

    @property
    def is_open(self) -> bool:
        """True while a pyvisa resource is open."""
        return self._resource is not None

    @property
    def timeout_s(self) -> float:
        """The read timeout in seconds."""
        return self._timeout_s

    @timeout_s.setter
    def timeout_s(self, value: float) -> None:
        if not (value > 0 and np.isfinite(value)):
            # InputError is a ValueError: callers that catch ValueError still do
            raise InputError(f"timeout_s must be positive and finite, got {value!r}")
        self._timeout_s = float(value)
        if self._resource is not None:
            self._resource.timeout = self._timeout_s * 1000.0

    @contextmanager
    def timeout(self, timeout_s: float) -> Iterator[None]:
        """Use another read timeout inside a ``with`` block."""
        saved = self._timeout_s
        self.timeout_s = timeout_s
        try:
            yield
        finally:
            if self._resource is not None:
                self.timeout_s = saved
            else:
                self._timeout_s = saved

    def _note(self, direction: str, text: str) -> None:
        if self._log is not None:
            self._log.record(self.resource_name, direction, text)

    @contextmanager
    def _mapped(self, what: str) -> Iterator[None]:
        """Map pyvisa and OS errors raised inside to our own, naming the resource."""
        if self._resource is None:
            raise ConnectionLost(f"{self.resource_name}: the session is closed; open it"
                                 f" again (reconnect) before {what!r}")
        try:
            yield
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == VISA_TIMEOUT_CODE:
                self._needs_sync = True
                self._note("note", f"timeout after {self._timeout_s:g} s: {what}")
                raise InstrumentTimeout(
                    f"{self.resource_name}: no reply to {what!r} within {self._timeout_s:g} s;"
                    " check that the instrument is on and idle, or raise timeout_s") from exc
            if exc.error_code in VISA_CONNECTION_CODES:
                self._note("note", f"connection lost: {what}")
                raise ConnectionLost(
                    f"{self.resource_name}: connection lost during {what!r} ({exc.abbreviation});"
                    " check the cable and power, then reconnect") from exc
            raise InstrumentError(f"{self.resource_name}: VISA error during {what!r}:"
                                  f" {exc.description}") from exc
        except UnicodeDecodeError as exc:
            # garbage on the line: the stream may be out of step, resynchronise first
            self._needs_sync = True
            self._note("note", f"undecodable reply: {what}")
            raise InstrumentError(
                f"{self.resource_name}: the reply to {what!r} is not text ({exc.reason});"
                " the line may be noisy or the instrument confused") from exc
        except OSError as exc:
            self._note("note", f"connection lost: {what}: {exc.__class__.__name__}")
            raise ConnectionLost(
                f"{self.resource_name}: connection lost or refused during {what!r}"
                f" ({exc.__class__.__name__}: {exc.strerror or exc}); check that the"
                " instrument is on and the address and port are right, then reconnect"
            ) from exc

    # ---------------------------------------------------------------- open/close
    def open(self) -> str:
        """Open the resource, set terminations and timeout, and ask ``*IDN?``.

        Returns
        -------
        str
            The identity.

        Raises
        ------
        ConnectionLost
            Nothing answers at the resource (refused, reset, unknown resource).
        InstrumentTimeout
            Something accepted the connection but did not answer ``*IDN?``.
        """
        if self._resource is not None:
            self.close_resource()
        rm = resource_manager(self.backend)
        try:
            resource = rm.open_resource(self.resource_name)
        except pyvisa.errors.VisaIOError as exc:
            raise ConnectionLost(f"{self.resource_name}: cannot open ({exc.abbreviation});"
                                 " check the resource string and that the instrument"
                                 " is reachable") from exc
        except (OSError, ValueError) as exc:
            raise ConnectionLost(f"{self.resource_name}: cannot open ({exc}); check the"
                                 " resource string and that the instrument is reachable"
                                 ) from exc
        if not hasattr(resource, "read_bytes"):
            resource.close()
            raise InstrumentError(f"{self.resource_name}: not a message-based resource")
        self._resource = resource
        try:
            if self.is_socket:
                resource.read_termination = "\n"
                resource.write_termination = "\n"
                # Back-to-back writes (a command, then the error query) would otherwise
                # wait for the peer's delayed ACK (Nagle): about 40 ms each.
                _set_nodelay(resource)
            resource.timeout = self._timeout_s * 1000.0
            self._needs_sync = False
            self._note("note", "open")
            self.identity = self.query("*IDN?")
        except BaseException:
            self.close_resource()
            raise
        if not self.identity:
            self.close_resource()
            raise InstrumentError(f"{self.resource_name}: empty answer to '*IDN?'; is this"
                                  " a SCPI instrument?")
        return self.identity

    def close_resource(self) -> None:
        """Close the pyvisa resource, ignoring errors of a connection already gone."""
        resource, self._resource = self._resource, None
        if resource is None:
            return
        with suppress(pyvisa.errors.Error, OSError):
            resource.close()
        self._note("note", "close")

    def close(self) -> None:
        """Close the resource and the traffic log this session opened."""
        self.close_resource()
        if self._owns_log and self._log is not None:
            self._log.close()
            self._log = None

    def reconnect(self) -> str:
        """Close and reopen the resource (never ``clear()`` on a dead socket).

        Returns
        -------
        str
            The identity read on reopening.
        """
        self._note("note", "reconnect")
        self.close_resource()
        return self.open()

    def __enter__(self) -> Session:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------ messages
    def _sync_if_needed(self) -> None:
        if self._needs_sync:
            self.clear()

    def write(self, command: str) -> None:
        """Send one command (the write termination is added)."""
        self._sync_if_needed()
        with self._mapped(command):
            self._note("write", command)
            self._resource.write(command)

    def query(self, command: str) -> str:
        """Send a query and return its reply without the terminator."""
        self._sync_if_needed()
        with self._mapped(command):
            self._note("write", command)
            self._resource.write(command)
            reply = self._resource.read()
        reply = reply.rstrip("\r\n")
        self._note("read", reply)
        return reply

    def query_float(self, command: str) -> float:
        """A query whose reply is one number.

        Raises
        ------
        InstrumentError
            The reply is not a number.
        """
        reply = self.query(command)
        try:
            return float(reply)
        except ValueError as exc:
            # a reply that is not the answer may be a stale one: resynchronise first
            self._needs_sync = True
            raise InstrumentError(f"{self.resource_name}: {command!r} answered {reply!r},"
                                  " not a number") from exc

    def query_block(self, command: str) -> bytes:
        """Send a query answered by a definite-length block; return its data bytes."""
        self._sync_if_needed()
        with self._mapped(command):
            self._note("write", command)
            self._resource.write(command)
            try:
                with _large_receives(self._resource):
                    payload = read_block(self._resource)
            except BlockFormatError:
                self._needs_sync = True
                raise
        self._note("read", f"#<{len(payload)} bytes> block")
        return payload

    def query_samples(self, command: str, data_type: str, byte_order: str = "little"
                      ) -> np.ndarray:
        """A block query decoded as samples of ``data_type`` (native byte order)."""
        return payload_to_samples(self.query_block(command), data_type, byte_order)

    def wait_complete(self, timeout_s: float | None = None) -> None:
        """``*OPC?``: return once every earlier command is done.

        Parameters
        ----------
        timeout_s
            How long to wait (default: the session timeout).
        """
        with self.timeout(timeout_s or self._timeout_s):
            reply = self.query("*OPC?")
        if reply.strip().lstrip("+") != "1":
            raise InstrumentError(f"{self.resource_name}: '*OPC?' answered {reply!r},"
                                  " not 1")

    def read_errors(self) -> list[tuple[int, str]]:
        """Pop the SCPI error queue until it is empty (``0,...``)."""
        if not self.error_query:
            return []
        found: list[tuple[int, str]] = []
        for _ in range(MAX_QUEUED_ERRORS):
            code, text = parse_error_reply(self.query(self.error_query))
            if code == 0:
                break
            found.append((code, text))
        return found

    def check_errors(self, after: str | None = None) -> None:
        """Read the error queue and raise the first error found.

        Parameters
        ----------
        after
            The command(s) just sent, for the message.

        Raises
        ------
        SCPIError
            With the instrument's code and text; later queued errors are noted in
            the text.
        """
        found = self.read_errors()
        if found:
            code, text = found[0]
            if len(found) > 1:
                text += f" (and {len(found) - 1} more queued: " + "; ".join(
                    f"{c},{t!r}" for c, t in found[1:]) + ")"
            raise SCPIError(code, text, after)

    def clear(self, quiet_s: float = 0.05) -> None:
        """Drop stale replies and resynchronise the message stream.

        After a timeout the instrument may still send the late reply. On a socket
        this drains whatever arrives within ``quiet_s``, then sends ``*IDN?`` and
        discards every line until the known identity comes back, so the late reply
        can never be taken for the next answer. Other interfaces use the VISA
        device clear.

        Raises
        ------
        InstrumentTimeout
            The identity did not come back within the timeout (reconnect).
        """
        if self._resource is None:
            raise ConnectionLost(f"{self.resource_name}: the session is closed")
        self._needs_sync = False
        self._note("note", "clear")
        resource = self._resource
        if not self.is_socket:
            with self._mapped("device clear"):
                resource.clear()
            return
        with self.timeout(quiet_s), self._mapped("drain"):
            try:
                while True:
                    resource.read_raw()
            except pyvisa.errors.VisaIOError as exc:
                if exc.error_code != VISA_TIMEOUT_CODE:
                    raise
        if not self.identity:
            return
        deadline = time.monotonic() + self._timeout_s
        self._needs_sync = True
        with self._mapped("*IDN?"):
            resource.write("*IDN?")
            while True:
                line = resource.read().rstrip("\r\n")
                if line == self.identity:
                    break
                self._note("note", f"dropped stale reply {line[:60]!r}")
                if time.monotonic() > deadline:
                    raise InstrumentTimeout(
                        f"{self.resource_name}: the instrument keeps sending stale data;"
                        " reconnect")
        self._needs_sync = False
