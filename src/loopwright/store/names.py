"""Safe names for run folders.

A procedure name or a board serial comes from a file or the command line and is never
trusted as a path: only ``[A-Za-z0-9._-]`` is kept, every other character (``/``,
``\\``, control characters, spaces, non-ASCII letters) becomes ``_``, leading dots are
dropped (no hidden folders, no ``..``), and each part is at most
:data:`MAX_PART_CHARS` characters. See the run-folder contract in DEVELOPERS.md.
"""

from __future__ import annotations

import re
from datetime import datetime, timezone

#: Longest sanitised part of a folder name.
MAX_PART_CHARS = 64
#: What an empty name becomes.
EMPTY_NAME = "unnamed"

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]")


def safe_part(text: str, *, max_chars: int = MAX_PART_CHARS) -> str:
    """One component of a folder name made safe.

    Parameters
    ----------
    text
        Any text (a procedure name, a serial number).
    max_chars
        Longest result.

    Returns
    -------
    str
        Only ``[A-Za-z0-9._-]``, no leading ``.``, 1 to ``max_chars`` characters;
        ``"unnamed"`` if nothing usable is left.

    Examples
    --------
    >>> safe_part("../x")
    '_x'
    >>> safe_part("board 7/rev B")
    'board_7_rev_B'
    """
    cleaned = _UNSAFE.sub("_", str(text)).lstrip(".")
    cleaned = cleaned[:max_chars]
    if not cleaned.strip("_"):
        return EMPTY_NAME
    return cleaned


def utc_stamp(moment: datetime | None = None) -> str:
    """``YYYYmmddTHHMMSSZ`` of ``moment`` (default: now), in UTC."""
    moment = moment or datetime.now(timezone.utc)
    return moment.astimezone(timezone.utc).strftime("%Y%m%dT%H%M%SZ")


def utc_iso(moment: datetime | None = None) -> str:
    """ISO 8601 UTC time with microseconds and a ``Z`` (default: now)."""
    moment = moment or datetime.now(timezone.utc)
    return moment.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def run_folder_name(procedure_name: str, serial: str, moment: datetime | None = None) -> str:
    """``<UTC time>_<procedure>_<serial>``, every part sanitised."""
    return f"{utc_stamp(moment)}_{safe_part(procedure_name)}_{safe_part(serial)}"
