"""IEEE 488.2 definite-length arbitrary blocks: encode, decode, and read from a session.

A definite-length block is ``#``, one nonzero digit X, X digits giving the byte
count Y, then Y bytes of data (IEEE 488.2-1992 7.7.6 (mem)). Instruments end the
reply with a newline after the data. ``#0`` starts an indefinite-length block, which
only the end of the message closes; over a raw socket there is no end-of-message
signal, so :func:`read_block` refuses it and :func:`decode_block` accepts it only in a
complete reply held in memory.

Reading a block with a terminated ``read()`` stops at the first 0x0A byte in the
data and leaves the session out of sync. :func:`read_block` therefore reads the
header, then exactly the announced byte count with the termination character
switched off, then the trailing newline.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any, Literal

import numpy as np

from loopwright.errors import InstrumentError

DataType = Literal["int8", "int16", "float32"]
ByteOrder = Literal["little", "big"]

#: numpy type letters of the sample types a block may hold.
DTYPE_CODES: dict[str, str] = {"int8": "i1", "int16": "i2", "float32": "f4"}

#: Longest run of bytes skipped while looking for the ``#`` of a block header.
MAX_HEADER_SKIP = 64


class BlockFormatError(InstrumentError):
    """The bytes are not a well-formed IEEE 488.2 block."""


def sample_dtype(data_type: str, byte_order: str = "little") -> np.dtype:
    """The numpy dtype of ``data_type`` stored in ``byte_order``.

    Raises
    ------
    ValueError
        Unknown data type or byte order.
    """
    if data_type not in DTYPE_CODES:
        raise ValueError(f"unknown data type {data_type!r}; use one of {sorted(DTYPE_CODES)}")
    if byte_order not in ("little", "big"):
        raise ValueError(f"unknown byte order {byte_order!r}; use 'little' or 'big'")
    return np.dtype(("<" if byte_order == "little" else ">") + DTYPE_CODES[data_type])


def encode_block(payload: bytes | bytearray | memoryview, terminator: bytes = b"\n") -> bytes:
    """Wrap ``payload`` as a definite-length block (IEEE 488.2-1992 7.7.6 (mem)).

    Parameters
    ----------
    payload
        The data bytes.
    terminator
        Appended after the data (the reply's message terminator); ``b""`` for none.

    Returns
    -------
    bytes
        ``#`` + digit count + byte count + data + terminator.
    """
    count = str(len(payload))
    if len(count) > 9:
        raise ValueError("a definite-length block holds at most 999,999,999 bytes")
    return b"#" + str(len(count)).encode() + count.encode() + bytes(payload) + terminator


def encode_samples(samples: Any, data_type: str, byte_order: str = "little",
                   terminator: bytes = b"\n") -> bytes:
    """Encode an array of samples as a block of ``data_type`` in ``byte_order``."""
    dtype = sample_dtype(data_type, byte_order)
    values = np.asarray(samples)
    if np.issubdtype(dtype, np.integer) and np.issubdtype(values.dtype, np.integer):
        info = np.iinfo(dtype)
        if values.size and (values.min() < info.min or values.max() > info.max):
            raise ValueError(f"samples do not fit in {data_type}")
    return encode_block(values.astype(dtype).tobytes(), terminator)


def parse_header(raw: bytes) -> tuple[int, int | None]:
    """Parse the header at the start of ``raw``.

    Returns
    -------
    (header_length, byte_count)
        ``byte_count`` is None for an indefinite-length (``#0``) block.

    Raises
    ------
    BlockFormatError
        Not a block header.
    """
    if len(raw) < 2 or raw[0:1] != b"#":
        raise BlockFormatError(f"a block starts with '#', got {raw[:12]!r}")
    digit = raw[1:2]
    if not digit.isdigit():
        raise BlockFormatError(f"a block header has a digit after '#', got {raw[:12]!r}")
    ndigits = int(digit)
    if ndigits == 0:
        return 2, None
    count_text = raw[2:2 + ndigits]
    if len(count_text) != ndigits or not count_text.isdigit():
        raise BlockFormatError(f"the block header announces {ndigits} length digits,"
                               f" got {raw[:2 + ndigits]!r}")
    return 2 + ndigits, int(count_text)


def decode_block(raw: bytes, terminator: bytes = b"\n") -> bytes:
    """The data bytes of one complete block reply held in memory.

    Leading bytes before ``#`` (a header echo such as ``:DATA ``) are skipped. After a
    definite-length block only ``terminator`` may follow. An indefinite-length block
    (``#0``) runs to the final ``terminator``.

    Raises
    ------
    BlockFormatError
        Malformed header, or fewer/more bytes than announced.
    """
    start = raw.find(b"#")
    if start < 0:
        raise BlockFormatError(f"no block header ('#') in the reply {raw[:24]!r}")
    body = raw[start:]
    header_length, count = parse_header(body)
    if count is None:
        data = body[header_length:]
        if terminator and data.endswith(terminator):
            data = data[: -len(terminator)]
        return data
    data = body[header_length:header_length + count]
    if len(data) != count:
        raise BlockFormatError(f"the block announces {count} bytes but holds {len(data)}")
    rest = body[header_length + count:]
    if rest not in (b"", terminator):
        raise BlockFormatError(f"{len(rest)} unexpected bytes after the block: {rest[:12]!r}")
    return data


def decode_samples(raw: bytes, data_type: str, byte_order: str = "little") -> np.ndarray:
    """Samples of a complete block reply, in native byte order."""
    return payload_to_samples(decode_block(raw), data_type, byte_order)


def payload_to_samples(payload: bytes, data_type: str, byte_order: str = "little") -> np.ndarray:
    """Data bytes -> a native-order numpy array of ``data_type``.

    Raises
    ------
    BlockFormatError
        The byte count is not a whole number of samples.
    """
    dtype = sample_dtype(data_type, byte_order)
    if len(payload) % dtype.itemsize:
        raise BlockFormatError(f"{len(payload)} bytes is not a whole number of"
                               f" {data_type} samples ({dtype.itemsize} bytes each)")
    samples = np.frombuffer(payload, dtype=dtype)
    return samples.astype(dtype.newbyteorder("="))


@contextmanager
def _termination_off(resource: Any) -> Iterator[None]:
    """Switch the read termination off, and back on even after an error."""
    saved = resource.read_termination
    resource.read_termination = None
    try:
        yield
    finally:
        resource.read_termination = saved


def read_block(resource: Any, terminator: bytes = b"\n") -> bytes:
    """Read one definite-length block from an open pyvisa message-based resource.

    The query has already been written. Reads ``#`` and the digit, the length digits,
    then exactly the announced byte count plus the trailing ``terminator`` with the
    termination character off, so 0x0A bytes in the data cost nothing.

    Parameters
    ----------
    resource
        A pyvisa ``MessageBasedResource`` (``read_bytes`` and ``read_termination``).
    terminator
        What the instrument sends after the data.

    Returns
    -------
    bytes
        The data bytes.

    Raises
    ------
    BlockFormatError
        No ``#`` within :data:`MAX_HEADER_SKIP` bytes, a bad header, an
        indefinite-length block (``#0``), or a missing terminator after the data. The
        session is out of sync afterwards: clear it before the next query.
    """
    with _termination_off(resource):
        skipped = b""
        while True:
            first = resource.read_bytes(1)
            if first == b"#":
                break
            skipped += first
            if len(skipped) > MAX_HEADER_SKIP:
                raise BlockFormatError(f"no block header ('#') in the reply {skipped[:24]!r}")
        digit = resource.read_bytes(1)
        if not digit.isdigit():
            raise BlockFormatError(f"a block header has a digit after '#', got {digit!r}")
        ndigits = int(digit)
        if ndigits == 0:
            raise BlockFormatError(
                "the instrument sent an indefinite-length block ('#0'), whose end cannot"
                " be found on a raw socket; set it to definite-length blocks")
        count_text = resource.read_bytes(ndigits)
        if not count_text.isdigit():
            raise BlockFormatError(f"bad block length digits {count_text!r}")
        count = int(count_text)
        want = count + len(terminator)
        # One read for data and terminator; a large chunk keeps the loop short.
        raw = resource.read_bytes(want, chunk_size=max(want, 1))
    if terminator and raw[count:] != terminator:
        raise BlockFormatError(f"expected {terminator!r} after the {count}-byte block,"
                               f" got {raw[count:]!r}")
    return raw[:count]
