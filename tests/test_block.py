"""IEEE 488.2 definite-length blocks (IEEE 488.2-1992 7.7.6 (mem)): '#', one nonzero
digit X, X digits of byte count Y, then Y data bytes.

Checked against hand-encoded blocks, in memory and through a real pyvisa-py session
over a loopback socket.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from loopwright.instruments.block import (
    BlockFormatError,
    decode_block,
    decode_samples,
    encode_block,
    encode_samples,
    parse_header,
)
from loopwright.instruments.session import Session

IDENTITY = "loopwright,block test,0,0"


# Hand-encoded blocks (IEEE 488.2-1992 7.7.6 (mem)): (bytes, data_type, order, samples)
HAND_BLOCKS = [
    # int16 little endian: 1, -2, 0x0A0A (two newline bytes in the data)
    (b"#16\x01\x00\xfe\xff\x0a\x0a\n", "int16", "little", [1, -2, 0x0A0A]),
    # the same samples big endian
    (b"#16\x00\x01\xff\xfe\x0a\x0a\n", "int16", "big", [1, -2, 0x0A0A]),
    # int8, odd length (5 bytes), with 0x0A inside
    (b"#15\x0a\x7f\x80\x00\x0a\n", "int8", "little", [10, 127, -128, 0, 10]),
    # float32 little: 1.0 = 00 00 80 3f, -2.5 = 00 00 20 c0 (IEEE 754)
    (b"#18\x00\x00\x80\x3f\x00\x00\x20\xc0\n", "float32", "little", [1.0, -2.5]),
    # float32 big
    (b"#18\x3f\x80\x00\x00\xc0\x20\x00\x00\n", "float32", "big", [1.0, -2.5]),
    # two length digits: 10 int8 samples of 0x0A
    (b"#210" + b"\x0a" * 10 + b"\n", "int8", "little", [10] * 10),
]


@pytest.mark.parametrize(("raw", "data_type", "order", "expected"), HAND_BLOCKS)
def test_decode_hand_encoded_block_ieee4882_7_7_6(raw, data_type, order, expected):
    samples = decode_samples(raw, data_type, order)
    np.testing.assert_array_equal(samples, np.array(expected))
    assert samples.dtype.isnative


@pytest.mark.parametrize(("raw", "data_type", "order", "expected"), HAND_BLOCKS)
def test_encoder_reproduces_hand_encoded_block(raw, data_type, order, expected):
    assert encode_samples(np.array(expected), data_type, order) == raw


def test_header_parse_and_indefinite_in_memory():
    assert parse_header(b"#3100xxx") == (5, 100)
    assert parse_header(b"#0abc") == (2, None)
    # '#0' indefinite: the data runs to the final newline (IEEE 488.2-1992 7.7.6 (mem))
    assert decode_block(b"#0\x01\x0a\x02\n") == b"\x01\x0a\x02"


@pytest.mark.parametrize("raw", [b"", b"15\x00", b"#x1", b"#3 12abc\n", b"#15ab\n",
                                 b"#12abcd\n"])
def test_malformed_blocks_refused(raw):
    with pytest.raises(BlockFormatError):
        decode_block(raw)


@settings(max_examples=60, deadline=None)
@given(st.binary(max_size=3000))
def test_encode_decode_round_trip(payload):
    assert decode_block(encode_block(payload)) == payload


# --------------------------------------------------------------- through pyvisa-py
@pytest.fixture
def block_server(scpi_recorder):
    """The recording server of ``tests/scpi_recorder.py`` under this file's identity."""
    scpi_recorder.identity = IDENTITY
    return scpi_recorder


@pytest.mark.parametrize(("raw", "data_type", "order", "expected"), HAND_BLOCKS)
def test_read_block_over_loopback(block_server, raw, data_type, order, expected):
    block_server.replies["DATA?"] = raw
    block_server.replies["NEXT?"] = b"after\n"
    with Session(block_server.resource, timeout_s=2.0) as session:
        samples = session.query_samples("DATA?", data_type, order)
        np.testing.assert_array_equal(samples, np.array(expected))
        # the stream stays in sync: the next reply is the next answer
        assert session.query("NEXT?") == "after"


def test_read_large_newline_heavy_block(block_server):
    # 100,001 int16 samples whose bytes are all 0x0A, then an odd-length int8 block
    codes = np.full(100_001, 0x0A0A, dtype=np.int16)
    block_server.replies["BIG?"] = encode_samples(codes, "int16", "big")
    odd = np.arange(-60, 61, dtype=np.int8)
    block_server.replies["ODD?"] = encode_samples(odd, "int8")
    with Session(block_server.resource, timeout_s=2.0) as session:
        np.testing.assert_array_equal(session.query_samples("BIG?", "int16", "big"), codes)
        np.testing.assert_array_equal(session.query_samples("ODD?", "int8"), odd)


def test_read_block_refuses_indefinite_and_missing_terminator(block_server):
    block_server.replies["INDEF?"] = b"#0\x01\x02\n"
    block_server.replies["NOTERM?"] = b"#12abX"
    with Session(block_server.resource, timeout_s=1.0) as session:
        with pytest.raises(BlockFormatError, match="indefinite-length"):
            session.query_block("INDEF?")
        with pytest.raises(BlockFormatError, match="expected"):
            session.query_block("NOTERM?")
        # the session resynchronises before the next exchange
        block_server.replies["OK?"] = b"fine\n"
        assert session.query("OK?") == "fine"
