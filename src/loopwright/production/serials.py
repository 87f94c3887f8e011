"""Board serials as typed or scanned, and their folder-safe form.

A serial comes from an operator's keyboard or a barcode scanner (which types the code
and an Enter, sometimes with framing control characters around it). It is data, never
a path: the run folder gets :func:`folder_safe` of it, while the index keeps the serial
as read (:func:`clean_serial`).
"""

from __future__ import annotations

import unicodedata

from loopwright.errors import InputError
from loopwright.store.names import MAX_PART_CHARS, safe_part

#: Longest serial accepted, in characters (a longer line is a misread or a pasted text).
MAX_SERIAL_CHARS = 128
#: Longest folder-safe part, in characters (run-folder contract).
MAX_FOLDER_PART_CHARS = MAX_PART_CHARS


def clean_serial(line: str) -> str:
    """The serial in one input line: surrounding whitespace and control characters removed.

    Control characters (Unicode category ``Cc``: NUL, ESC, STX/ETX, CR, LF, ...) are
    removed wherever they are: they cannot be printed on a label, and scanners add them
    as framing. Everything else is kept as read, so the index stores what was scanned.

    Parameters
    ----------
    line
        One line from the operator's terminal or a scanner.

    Returns
    -------
    str
        The serial, possibly empty (an empty line ends a batch).

    Raises
    ------
    InputError
        If the serial is longer than :data:`MAX_SERIAL_CHARS`.
    """
    kept = "".join(ch for ch in line if unicodedata.category(ch) != "Cc")
    serial = kept.strip()
    if len(serial) > MAX_SERIAL_CHARS:
        raise InputError(
            f"serial is {len(serial)} characters long; at most {MAX_SERIAL_CHARS} are "
            "accepted (was a whole text pasted or two labels scanned?)",
            field="serial",
        )
    return serial


def folder_safe(text: str, max_chars: int = MAX_FOLDER_PART_CHARS) -> str:
    """A form of ``text`` that can be one part of a folder name on any file system.

    The run folder's own rule (:func:`loopwright.store.names.safe_part`, so the index
    and the folder agree): every character outside ``[A-Za-z0-9._-]`` becomes ``_``
    (path separators, control characters, spaces, non-ASCII letters), leading dots are
    dropped (no hidden folders, no ``..``), the result is cut to ``max_chars``, and a
    name with nothing but ``_`` left becomes ``unnamed``. Path separators never
    survive, so the result cannot leave its parent folder.

    Examples
    --------
    >>> folder_safe("../../etc")
    '_.._etc'
    >>> folder_safe("a/b")
    'a_b'
    """
    return safe_part(text, max_chars=max_chars)
