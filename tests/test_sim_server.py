"""The loopback TCP server and the ``loopwright sim`` command."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import threading

import pytest

from loopwright.cli import main
from mock_instruments.duts import DUTS, model_list
from mock_instruments.server import InstrumentServer


def connect(resource: str) -> socket.socket:
    _, host, port, _ = resource.split("::")
    sock = socket.create_connection((host, int(port)), timeout=2.0)
    return sock


def read_line(sock: socket.socket) -> bytes:
    data = b""
    while not data.endswith(b"\n"):
        chunk = sock.recv(65536)
        if not chunk:
            raise ConnectionError("closed")
        data += chunk
    return data


def test_binds_loopback_by_default(sim_bench):
    for role, server in sim_bench.servers.items():
        assert server.host == "127.0.0.1"
        assert sim_bench.resources[role] == f"TCPIP0::127.0.0.1::{server.port}::SOCKET"
    ports = {s.port for s in sim_bench.servers.values()}
    assert len(ports) == 3  # one port per instrument


def test_identity_carries_the_port(sim_bench, open_sim):
    port = sim_bench.servers["scope"].port
    scope = open_sim(sim_bench.resources["scope"])
    assert scope.query("*IDN?").split(",")[2] == f"SIM-{port}"


def test_replies_end_in_one_newline_and_blocks_have_exact_length(sim_bench):
    with connect(sim_bench.resources["scope"]) as sock, sock.makefile("rb") as stream:
        sock.sendall(b"*IDN?\r\n\nTIM:POIN 1000;:ACQ:SING;*OPC?\n")
        assert stream.readline().startswith(b"loopwright,simulated scope")
        assert stream.readline() == b"1\n"
        sock.sendall(b"WAV:DATA?\n")
        # IEEE 488.2 definite-length block: '#', digit count, length, bytes; then '\n'.
        assert stream.read(6) == b"#42000"
        assert len(stream.read(2000)) == 2000
        assert stream.read(1) == b"\n"
        sock.sendall(b"*OPC?\n")
        assert stream.readline() == b"1\n"  # nothing else was sent in between


def test_serves_several_connections_at_once(sim_bench):
    results = []

    def client() -> None:
        with connect(sim_bench.resources["generator"]) as sock:
            for _ in range(20):
                sock.sendall(b"SOUR1:FREQ?\n")
                results.append(read_line(sock))

    threads = [threading.Thread(target=client) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=10)
    assert results == [b"1000\n"] * 80


def test_close_disconnects_clients_and_is_idempotent(start_sim_bench):
    server = start_sim_bench()
    sock = connect(server.resources["generator"])
    sock.sendall(b"*IDN?\n")
    read_line(sock)
    server.close()
    sock.settimeout(2.0)
    assert sock.recv(10) == b""  # the server shut the connection
    sock.close()
    server.close()
    with pytest.raises(OSError):
        connect(server.resources["generator"]).sendall(b"*IDN?\n")


def test_close_before_any_client_does_not_hang(sim_bench):
    server = InstrumentServer(sim_bench.instruments["generator"])
    server.close()


# -- the command line --------------------------------------------------------------------


def test_sim_list_names_every_model(capsys):
    assert main(["sim", "list"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert [line.split()[0] for line in out] == sorted(DUTS)
    assert main(["sim", "list", "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert [(m["name"], m["description"]) for m in listed] == model_list()


def test_sim_serve_rejects_a_bad_dut_with_one_line(capsys):
    assert main(["sim", "serve", "--dut", "no-such-model"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("loopwright: error:") and "\n" not in err


def _read_first_line(proc: subprocess.Popen, timeout_s: float) -> str:
    box: list[str] = []
    reader = threading.Thread(target=lambda: box.append(proc.stdout.readline()), daemon=True)
    reader.start()
    reader.join(timeout_s)
    if not box:
        proc.kill()
        pytest.fail(f"sim serve printed nothing in {timeout_s} s")
    return box[0]


@pytest.mark.parametrize("json_mode", [True, False])
def test_sim_serve_subprocess_answers_and_stops_on_sigterm(visa_rm, json_mode):
    args = [sys.executable, "-m", "loopwright", "sim", "serve", "--seed", "3", "--noise", "0.001"]
    if json_mode:
        args += ["--json", "--scope", "scope-text", "--generator", "generator-output-tree"]
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    proc = subprocess.Popen(
        args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env
    )
    try:
        if json_mode:
            summary = json.loads(_read_first_line(proc, 30.0))
            resources = summary["resources"]
            assert summary["dialects"]["scope"] == "scope-text"
        else:
            lines = [_read_first_line(proc, 30.0) for _ in range(3)]
            resources = {line.split()[0]: line.split()[1] for line in lines}
        assert set(resources) == {"generator", "scope", "switch"}
        assert all(r.startswith("TCPIP0::127.0.0.1::") for r in resources.values())
        inst = visa_rm.open_resource(
            resources["scope"], read_termination="\n", write_termination="\n", timeout=3000
        )
        try:
            dialect = "scope-text" if json_mode else "scope-block"
            assert f"simulated scope ({dialect})" in inst.query("*IDN?")
        finally:
            inst.close()
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=15)
        assert proc.returncode == 0
        assert "stopped" in err
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
