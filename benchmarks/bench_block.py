"""Read speed of a 1,000,000-sample int16 block over loopback TCP.

Three readers fetch the same IEEE 488.2 definite-length block (IEEE 488.2-1992 7.7.6
(mem)) of a sine record from a server in another process:

1. loopwright's block reader (:meth:`Session.query_samples`: header, then exactly the
   announced byte count with the termination character off);
2. pyvisa's ``query_binary_values`` on the same kind of pyvisa-py resource;
3. a plain Python socket reading exactly the announced bytes (the floor).

Run: ``python benchmarks/bench_block.py [--repeats N] [--write FILE]``. The target is
reader 1 at least 10x faster than reader 2. A second record made only of 0x0A bytes
shows why: pyvisa-py returns at every 0x0A when the termination is on.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import platform
import socket
import socketserver
import statistics
import time
from pathlib import Path

import numpy as np

SAMPLES = 1_000_000
RECORDS = {
    # 1,000,000 int16 samples of a sine, 97 cycles, 30,000 codes peak
    "sine": np.round(30000 * np.sin(2 * np.pi * 97 * np.arange(SAMPLES) / SAMPLES)
                     ).astype("<i2"),
    # every byte 0x0A: the worst case for a reader that stops at newlines
    "newlines": np.full(SAMPLES, 0x0A0A, dtype="<i2"),
}


def _serve(conn) -> None:
    from loopwright.instruments.block import encode_block

    blocks = {f"{name}?".encode(): encode_block(rec.tobytes()) for name, rec in RECORDS.items()}

    class Handler(socketserver.StreamRequestHandler):
        def handle(self) -> None:
            try:
                for raw in self.rfile:
                    line = raw.strip()
                    if line == b"*IDN?":
                        self.wfile.write(b"loopwright,benchmark server,0,0\n")
                    elif line in blocks:
                        self.wfile.write(blocks[line])  # one write per reply
            except (ConnectionResetError, BrokenPipeError):
                pass

    class Server(socketserver.ThreadingTCPServer):
        daemon_threads = True

    with Server(("127.0.0.1", 0), Handler) as server:
        conn.send(server.server_address[1])
        server.serve_forever(0.05)


def _plain_socket(port: int, query: bytes) -> np.ndarray:
    with socket.create_connection(("127.0.0.1", port)) as sock:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        buf = sock.makefile("rb")

        def once() -> np.ndarray:
            sock.sendall(query)
            assert buf.read(1) == b"#"
            ndigits = int(buf.read(1))
            count = int(buf.read(ndigits))
            data = buf.read(count + 1)
            return np.frombuffer(data[:count], dtype="<i2")
        return once


def _time(func, repeats: int, warm_up: bool = True
          ) -> tuple[tuple[float, float], np.ndarray]:
    result = func() if warm_up else None
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        result = func()
        times.append(time.perf_counter() - start)
    return (statistics.median(times), min(times)), result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=15)
    parser.add_argument("--write", type=Path, help="write a Markdown table to this file")
    args = parser.parse_args()

    import pyvisa

    from loopwright.instruments.session import Session

    parent, child = mp.Pipe()
    proc = mp.Process(target=_serve, args=(child,), daemon=True)
    proc.start()
    port = parent.recv()
    resource = f"TCPIP0::127.0.0.1::{port}::SOCKET"
    rm = pyvisa.ResourceManager("@py")
    rows = []
    try:
        for name, record in RECORDS.items():
            query = f"{name}?"
            newline_bytes = record.tobytes().count(b"\n")
            with Session(resource, timeout_s=30.0) as session:
                ours, got = _time(lambda q=query, s=session: s.query_samples(q, "int16"),
                                  args.repeats)
                assert np.array_equal(got, record)
            plain = rm.open_resource(resource, read_termination="\n",
                                     write_termination="\n", timeout=60_000)
            try:
                # the newline record takes about 30 s per read this way: once is enough
                slow = newline_bytes > 100_000
                theirs, got = _time(lambda q=query, r=plain: r.query_binary_values(
                    q, datatype="h", is_big_endian=False, container=np.array),
                    1 if slow else max(3, args.repeats // 3), warm_up=not slow)
                assert np.array_equal(got, record)
            finally:
                plain.close()
            floor, got = _time(_plain_socket(port, f"{query}\n".encode()), args.repeats)
            assert np.array_equal(got, record)
            rows.append((name, newline_bytes, ours, theirs, floor))
    finally:
        proc.terminate()
        proc.join(5)

    header = ("| record (1,000,000 int16) | 0x0A bytes | loopwright read_block | pyvisa"
              " query_binary_values | plain socket (floor) | speed-up vs pyvisa |")
    lines = [header, "|---|---|---|---|---|---|"]
    def ms(pair: tuple[float, float]) -> str:
        return f"{pair[0] * 1e3:.2f} ms ({pair[1] * 1e3:.2f})"

    for name, nl, ours, theirs, floor in rows:
        lines.append(f"| {name} | {nl:,} | {ms(ours)} | {ms(theirs)} | {ms(floor)} |"
                     f" {theirs[0] / ours[0]:.1f}x |")
    table = "\n".join(lines)
    print(table)
    if args.write:
        import pyvisa_py
        info = (f"Python {platform.python_version()}, PyVISA {pyvisa.__version__}, PyVISA-py"
                f" {pyvisa_py.__version__ if hasattr(pyvisa_py, '__version__') else '?'},"
                f" numpy {np.__version__}, {mp.cpu_count()} cores, median of"
                f" {args.repeats} reads, best in brackets (pyvisa:"
                f" {max(3, args.repeats // 3)}; one read of the newline record), server"
                " in another process on 127.0.0.1; 1-minute load average after the run"
                f" {os.getloadavg()[0]:.1f} (the machine is shared: expect noise).")
        args.write.write_text(
            "# Instruments benchmarks\n\n"
            "## IEEE 488.2 block read, 1,000,000 int16 samples over loopback TCP\n\n"
            "`python benchmarks/bench_block.py --write benchmarks/RESULTS-instruments.md`"
            "\n\n" + info + "\n\n" + table + "\n\nTarget: loopwright's reader at least 10x"
            " faster than `query_binary_values` on the sine record.\n")


if __name__ == "__main__":
    main()
