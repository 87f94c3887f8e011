"""loopwright: open-loop gain/phase sweeps of feedback circuits over VISA.

``loopwright.load_run(path)`` reads a run folder back (points as a pandas DataFrame,
manifest, summary, the response as a FrequencyResponse, ``to_frd()`` for
python-control).
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version
from typing import Any

try:
    __version__ = version("loopwright")
except PackageNotFoundError:  # running from a checkout without an install
    __version__ = "0.0.0+checkout"

__all__ = ["__version__", "load_run"]


def __getattr__(name: str) -> Any:
    # load_run pulls in pandas; import it only when asked for
    if name == "load_run":
        from loopwright.store import load_run

        return load_run
    raise AttributeError(f"module 'loopwright' has no attribute {name!r}")
