"""loopwright: open-loop gain/phase sweeps of feedback circuits over VISA."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("loopwright")
except PackageNotFoundError:  # running from a checkout without an install
    __version__ = "0.0.0+checkout"

__all__ = ["__version__"]
