"""Where the shipped data folders are: drivers, example procedures, example responses.

An installed wheel carries them under ``loopwright/_data/``; a source checkout (also
an editable install) has them at the repository's top level. Both are found.
"""

from __future__ import annotations

from pathlib import Path

from loopwright.errors import InputError

_PACKAGE_DIR = Path(__file__).resolve().parent
_CHECKOUT_DIR = _PACKAGE_DIR.parent.parent


def data_dir(name: str) -> Path:
    """The shipped folder ``name`` (``drivers``, ``procedures`` or ``examples``).

    Raises
    ------
    InputError
        Neither the wheel's copy nor a checkout's folder exists (a broken install:
        reinstall loopwright).
    """
    for candidate in (_PACKAGE_DIR / "_data" / name, _CHECKOUT_DIR / name):
        if candidate.is_dir():
            return candidate
    raise InputError(f"the shipped folder {name!r} is missing; reinstall loopwright")
