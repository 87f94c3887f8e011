"""Serve simulated instruments on loopback TCP, one port per instrument.

Each instrument is a raw SCPI socket (``TCPIP0::127.0.0.1::PORT::SOCKET``): lines
ending in ``\\n`` in, one write per reply out (always ending in ``\\n``, blocks too),
``TCP_NODELAY`` set. Without both a reply split into writes costs about 44 ms per
query through Nagle's algorithm (measured, see the project's visa notes).

The server binds to 127.0.0.1 unless a host is given explicitly, listens from the
constructor (a client may connect at once), serves from a daemon thread, and closes
in the safe order: shutdown (only if serving started), close the listening socket,
close the open connections, join.

Example
-------
>>> server = serve_bench(bench)                      # doctest: +SKIP
>>> server.resources["scope"]                        # doctest: +SKIP
'TCPIP0::127.0.0.1::40211::SOCKET'
>>> server.close()                                   # doctest: +SKIP
"""

from __future__ import annotations

import contextlib
import socket
import socketserver
import threading
import time
from typing import Any

from mock_instruments.instruments import make_instruments
from mock_instruments.scpi import SimulatedInstrument

LOOPBACK = "127.0.0.1"


class _ConnectionHandler(socketserver.BaseRequestHandler):
    server: _InstrumentTCPServer

    def setup(self) -> None:
        self.request.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.server.track(self.request, add=True)

    def finish(self) -> None:
        self.server.track(self.request, add=False)

    def handle(self) -> None:
        instrument = self.server.instrument
        instrument.faults.on_connect()
        buffer = b""
        try:
            while True:
                chunk = self.request.recv(65536)
                if not chunk:
                    return
                buffer += chunk
                while b"\n" in buffer:
                    line, buffer = buffer.split(b"\n", 1)
                    message = line.decode("latin-1").rstrip("\r")
                    if not message.strip():
                        continue
                    outcome = instrument.respond(message)
                    if outcome.drop:
                        with contextlib.suppress(OSError):
                            self.request.shutdown(socket.SHUT_RDWR)
                        return
                    if outcome.reply is None:
                        continue
                    if outcome.delay_s > 0:
                        time.sleep(outcome.delay_s)
                    self.request.sendall(outcome.reply)
        except (ConnectionResetError, BrokenPipeError, OSError):
            # The client went away (or close() shut the socket): nothing to answer.
            return


class _InstrumentTCPServer(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True

    def __init__(self, address: tuple[str, int], instrument: SimulatedInstrument) -> None:
        self.instrument = instrument
        self._connections: set[socket.socket] = set()
        self._connections_lock = threading.Lock()
        super().__init__(address, _ConnectionHandler)

    def track(self, sock: socket.socket, *, add: bool) -> None:
        with self._connections_lock:
            if add:
                self._connections.add(sock)
            else:
                self._connections.discard(sock)

    def close_connections(self) -> None:
        with self._connections_lock:
            connections = list(self._connections)
        for sock in connections:
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_RDWR)


class InstrumentServer:
    """One simulated instrument on one TCP port.

    Parameters
    ----------
    instrument
        The model to serve; its ``serial`` becomes the port number (for ``*IDN?``).
    host
        Address to bind; 127.0.0.1 unless given explicitly.
    port
        0 (the default) lets the system pick a free port.
    """

    def __init__(self, instrument: SimulatedInstrument, host: str = LOOPBACK, port: int = 0):
        self.instrument = instrument
        self._server = _InstrumentTCPServer((host, port), instrument)
        self.host, self.port = self._server.server_address[:2]
        instrument.serial = str(self.port)
        self._started = threading.Event()
        self._thread = threading.Thread(
            target=self._serve, name=f"sim-{instrument.role}-{self.port}", daemon=True
        )
        self._thread.start()
        self._closed = False

    def _serve(self) -> None:
        self._started.set()
        self._server.serve_forever(poll_interval=0.05)

    @property
    def resource(self) -> str:
        """The VISA resource string of this instrument."""
        host = LOOPBACK if self.host in ("0.0.0.0", "") else self.host
        return f"TCPIP0::{host}::{self.port}::SOCKET"

    def close(self) -> None:
        """Stop serving and close every connection (safe to call twice)."""
        if self._closed:
            return
        self._closed = True
        # shutdown() waits for serve_forever to acknowledge; it deadlocks if serving
        # never started, hence the guard.
        if self._started.wait(timeout=5.0):
            self._server.shutdown()
        self._server.server_close()
        self._server.close_connections()
        self._thread.join(timeout=5.0)


class BenchServer:
    """A simulated bench served on TCP: one :class:`InstrumentServer` per role.

    Attributes
    ----------
    bench
        The shared :class:`~mock_instruments.bench.SimulatedBench`.
    instruments
        role -> the simulated instrument (reach ``.faults`` and ``.errors`` here).
    resources
        role -> VISA resource string (``TCPIP0::127.0.0.1::PORT::SOCKET``).
    """

    def __init__(self, bench: Any, servers: dict[str, InstrumentServer]) -> None:
        self.bench = bench
        self.servers = servers
        self.instruments = {role: s.instrument for role, s in servers.items()}
        self.resources = {role: s.resource for role, s in servers.items()}

    def close(self) -> None:
        """Stop every instrument's server."""
        for server in self.servers.values():
            server.close()

    def __enter__(self) -> BenchServer:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def serve_bench(
    bench: Any,
    dialects: dict[str, str] | None = None,
    host: str = LOOPBACK,
    realtime: bool = False,
    *,
    ports: dict[str, int] | None = None,
    seed: int | None = None,
) -> BenchServer:
    """Serve ``bench`` on TCP, one port per instrument.

    Parameters
    ----------
    bench
        The simulated bench the instruments share.
    dialects
        role -> dialect; default ``generator-source-tree``, ``scope-block``,
        ``switch-relay`` (see :data:`mock_instruments.instruments.DEFAULT_DIALECTS`).
    host
        Address to bind: 127.0.0.1 unless given explicitly.
    realtime
        Acquisitions take their real duration.
    ports
        role -> fixed port; roles not named get a free port.
    seed
        Seed of the fault hooks' random garbage.

    Returns
    -------
    BenchServer
        With ``.resources`` (role -> resource string), ``.instruments`` and ``.close()``.
    """
    instruments = make_instruments(bench, dialects, realtime=realtime, seed=seed)
    servers: dict[str, InstrumentServer] = {}
    try:
        for role, instrument in instruments.items():
            port = (ports or {}).get(role, 0)
            servers[role] = InstrumentServer(instrument, host=host, port=port)
    except OSError:
        for server in servers.values():
            server.close()
        raise
    return BenchServer(bench, servers)
