"""A small recording SCPI server on loopback TCP, for real pyvisa-py sessions in tests.

It records every line it receives, stores ``HEADER value`` commands and answers
``HEADER?`` from them, keeps an error queue (``SYST:ERR?`` and its variants), answers
``*IDN?`` and ``*OPC?``, and takes canned replies per test:

``replies[line]``
    bytes (sent as they are), text (sent with ``\\n``), ``None`` (no reply), :data:`DROP`
    (the connection is closed without a reply), or a callable returning one of those.
``reject[line]``
    the SCPI error entry the command queues instead of being stored.

An unknown query queues -113 and gets no reply. Used through the ``scpi_recorder``
fixture of ``tests/conftest.py``.
"""

from __future__ import annotations

import socketserver
import threading
from collections.abc import Iterator
from contextlib import contextmanager

#: A canned reply that closes the connection without answering.
DROP = object()

ERROR_QUERIES = {"SYST:ERR?", "SYST:ERR:NEXT?", ":SYST:ERR?"}


class RecordingServer(socketserver.ThreadingTCPServer):
    """Recording SCPI server on an ephemeral loopback port (see the module docstring)."""

    daemon_threads = True
    allow_reuse_address = True

    def __init__(self) -> None:
        self.identity = "loopwright,test instrument,SIM-0,0"
        self.commands: list[str] = []
        self.state: dict[str, str] = {}
        self.errors: list[str] = []
        self.replies: dict[str, object] = {}
        self.reject: dict[str, str] = {}
        super().__init__(("127.0.0.1", 0), _RecordingHandler)

    @property
    def resource(self) -> str:
        """The VISA resource string of this server."""
        return f"TCPIP0::127.0.0.1::{self.server_address[1]}::SOCKET"

    def sent_since(self, mark: int) -> list[str]:
        """The lines received after the first ``mark``."""
        return self.commands[mark:]

    def answer(self, line: str) -> bytes | object | None:
        """The reply to ``line`` (bytes), ``None`` for none, or :data:`DROP`."""
        self.commands.append(line)
        if line in self.replies:
            reply = self.replies[line]
            reply = reply() if callable(reply) else reply
            if reply is None or reply is DROP or isinstance(reply, bytes):
                return reply
            return f"{reply}\n".encode()
        if line == "*IDN?":
            return f"{self.identity}\n".encode()
        if line == "*OPC?":
            return b"1\n"
        if line in ERROR_QUERIES:
            entry = self.errors.pop(0) if self.errors else '0,"No error"'
            return f"{entry}\n".encode()
        if line == "*CLS":
            self.errors.clear()
            return None
        if line in self.reject:
            self.errors.append(self.reject[line])
            return None
        if line.endswith("?"):
            if line[:-1] in self.state:
                return f"{self.state[line[:-1]]}\n".encode()
            self.errors.append('-113,"Undefined header"')
            return None
        header, _, value = line.partition(" ")
        self.state[header] = value
        return None


class _RecordingHandler(socketserver.StreamRequestHandler):
    def handle(self) -> None:
        server: RecordingServer = self.server  # type: ignore[assignment]
        try:
            for raw in self.rfile:
                reply = server.answer(raw.decode().strip())
                if reply is DROP:
                    return
                if isinstance(reply, bytes):
                    self.wfile.write(reply)  # one write per reply (no Nagle stall)
        except (ConnectionResetError, BrokenPipeError):
            pass


@contextmanager
def serving() -> Iterator[RecordingServer]:
    """A running :class:`RecordingServer`, shut down on exit."""
    server = RecordingServer()
    thread = threading.Thread(target=server.serve_forever, args=(0.05,), daemon=True)
    thread.start()
    try:
        yield server
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=5)
