"""Session: *IDN? on open, timeouts, stale replies, error queue, reconnect, traffic log.

A real pyvisa-py session over loopback TCP to a small recording SCPI server.
"""

from __future__ import annotations

import io
import socket
import time

import pytest

from loopwright.errors import ConnectionLost, InstrumentError, InstrumentTimeout, SCPIError
from loopwright.instruments.block import encode_block
from loopwright.instruments.session import Session, parse_error_reply
from scpi_recorder import DROP

IDENTITY = "loopwright,session test,SIM-0,1.0"


@pytest.fixture
def server(scpi_recorder):
    """The recording server of ``tests/scpi_recorder.py`` with this file's canned replies."""

    def slow() -> str:
        time.sleep(0.4)
        return "late"

    def bad() -> None:
        scpi_recorder.errors.extend(['-113,"Undefined header"', '-222,"Data out of range"'])

    scpi_recorder.identity = IDENTITY
    scpi_recorder.replies.update({
        "SLOW?": slow,
        "FAST?": "fast",
        "GARBLE?": b"\xff\xfe\x80\n",
        "BAD": bad,
        "DROP?": DROP,  # close the connection without a reply
        "BLK?": encode_block(b"\x0a\x01\x0a"),
    })
    return scpi_recorder


def test_open_asks_identity_and_sets_terminations(server):
    with Session(server.resource, timeout_s=2.0) as session:
        assert session.identity == IDENTITY
        assert session.query("FAST?") == "fast"
        session.wait_complete()
    assert server.commands == ["*IDN?", "FAST?", "*OPC?"]


def test_dead_port_fails_fast_with_connection_lost(visa_rm):
    # bind, read the port, close: nothing listens there any more
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()
    start = time.monotonic()
    with pytest.raises(ConnectionLost, match=f"127.0.0.1::{port}::SOCKET"):
        Session(f"TCPIP0::127.0.0.1::{port}::SOCKET", timeout_s=2.0)
    assert time.monotonic() - start < 1.5


def test_timeout_then_stale_reply_is_not_taken_for_next_answer(server):
    with Session(server.resource, timeout_s=0.15) as session:
        with pytest.raises(InstrumentTimeout, match="SLOW") as info:
            session.query("SLOW?")
        assert info.value.__cause__ is not None  # raised from the VisaIOError
        session.timeout_s = 2.0
        # the late "late" arrives now; the next answer must still be "fast"
        assert session.query("FAST?") == "fast"
        assert session.query("FAST?") == "fast"


def test_garbled_reply_is_our_error_and_stream_recovers(server):
    with Session(server.resource, timeout_s=2.0) as session:
        with pytest.raises(InstrumentError, match="not text") as info:
            session.query("GARBLE?")
        assert isinstance(info.value.__cause__, UnicodeDecodeError)
        assert session.query("FAST?") == "fast"


def test_error_queue_raised_with_code_and_text(server):
    with Session(server.resource, timeout_s=2.0, error_query="SYST:ERR?") as session:
        session.write("BAD")
        with pytest.raises(SCPIError) as info:
            session.check_errors(after="BAD")
        assert info.value.code == -113
        assert "Undefined header" in info.value.text
        assert "-222" in info.value.text  # the second queued error is reported too
        assert info.value.command == "BAD"
        session.check_errors()  # the queue is empty now: no error


def test_parse_error_reply_scpi_form():
    # SCPI 1999.0 SYSTem:ERRor? reply form <code>,"<text>" (mem)
    assert parse_error_reply('-222,"Data out of range"') == (-222, "Data out of range")
    assert parse_error_reply('+0,"No error"') == (0, "No error")


def test_reconnect_after_dropped_connection(server):
    with Session(server.resource, timeout_s=0.2) as session:
        with pytest.raises((InstrumentTimeout, ConnectionLost)):
            session.query("DROP?")
        assert session.reconnect() == IDENTITY
        assert session.query("FAST?") == "fast"


def test_traffic_log_lines(server):
    log = io.StringIO()
    with Session(server.resource, timeout_s=2.0, traffic_log=log) as session:
        session.query("FAST?")
        assert session.query_block("BLK?") == b"\x0a\x01\x0a"
    lines = [line.split("\t") for line in log.getvalue().splitlines()]
    assert all(len(parts) == 4 for parts in lines)
    assert all(parts[1] == server.resource for parts in lines)
    assert all(parts[0].endswith("+00:00") and "T" in parts[0] for parts in lines)
    exchanges = [(d, t) for _, _, d, t in lines if d != "note"]
    assert exchanges == [("write", "*IDN?"), ("read", IDENTITY), ("write", "FAST?"),
                         ("read", "fast"), ("write", "BLK?"), ("read", "#<3 bytes> block")]


def test_traffic_log_to_path(server, tmp_path):
    path = tmp_path / "traffic.log"
    with Session(server.resource, timeout_s=2.0, traffic_log=path) as session:
        session.query("FAST?")
    text = path.read_text()
    assert "\twrite\tFAST?\n" in text and "\tread\tfast\n" in text


def test_closed_session_refuses(server):
    session = Session(server.resource, timeout_s=2.0)
    session.close()
    with pytest.raises(ConnectionLost, match="closed"):
        session.query("FAST?")


@pytest.mark.parametrize("timeout_s", [0.0, -1.0, float("nan"), float("inf")])
def test_bad_timeout_is_our_input_error(timeout_s):
    """Refused before anything is opened (the VISA layer takes finite milliseconds)."""
    from loopwright.errors import InputError

    with pytest.raises(InputError, match="timeout_s must be positive and finite"):
        Session("TCPIP::127.0.0.1::1::SOCKET", timeout_s=timeout_s)
