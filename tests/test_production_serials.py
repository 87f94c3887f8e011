"""Board serials: cleaned as read, and never able to steer a path."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from loopwright.errors import InputError
from loopwright.production.serials import MAX_SERIAL_CHARS, clean_serial, folder_safe

SAFE = re.compile(r"[A-Za-z0-9._-]{1,64}")


@pytest.mark.parametrize(
    ("line", "serial"),
    [
        ("LW-0001\n", "LW-0001"),
        ("  LW-0001 \r\n", "LW-0001"),  # terminal or scanner line ending
        ("\x02LW-0001\x03", "LW-0001"),  # STX/ETX framing of some scanners
        ("LW\x000\x1b[2J01", "LW0[2J01"),  # NUL and ESC dropped, printable kept
        ("Ωmega 7/B", "Ωmega 7/B"),  # kept as read: data, not a path
        ("\n", ""),
        ("", ""),
    ],
)
def test_clean_serial(line: str, serial: str) -> None:
    assert clean_serial(line) == serial


def test_overlong_serial_is_refused() -> None:
    assert clean_serial("x" * MAX_SERIAL_CHARS) == "x" * MAX_SERIAL_CHARS
    with pytest.raises(InputError, match="at most 128"):
        clean_serial("x" * (MAX_SERIAL_CHARS + 1))


@pytest.mark.parametrize(
    ("serial", "part"),
    [
        ("../../etc", "_.._etc"),
        ("a/b", "a_b"),
        ("..", "unnamed"),
        ("C:\\boards\\7", "C__boards_7"),
        ("Ωmega-7", "_mega-7"),
        ("/", "unnamed"),
        ("LW-0001.rev_B", "LW-0001.rev_B"),
    ],
)
def test_folder_safe_table(serial: str, part: str) -> None:
    assert folder_safe(serial) == part


@given(st.text(max_size=200))
def test_folder_safe_never_leaves_its_parent(text: str) -> None:
    part = folder_safe(text)
    assert SAFE.fullmatch(part)
    assert not part.startswith(".")
    parent = Path("/runs")
    assert (parent / part).resolve().parent == parent  # one level down, always
