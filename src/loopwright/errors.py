"""Error classes of loopwright.

Every error the tool raises on purpose derives from :class:`LoopwrightError` and
carries a message a bench engineer can act on: what went wrong, where, and what to
do next. Foreign errors (pyvisa, OSError, YAML, pydantic) are mapped to these at the
boundary with ``raise ... from exc`` so the cause is kept.

Hierarchy::

    LoopwrightError
    ├── InputError              a file or argument is wrong (file, line, field)
    ├── EstimationError         a waveform cannot give a gain/phase point
    ├── AnalysisError           a frequency response cannot give loop figures
    ├── InstrumentError         talking to an instrument failed
    │   ├── InstrumentTimeout   no reply within the timeout
    │   ├── ConnectionLost      the connection dropped or was refused
    │   └── SCPIError           the instrument reported an error on its queue
    ├── DriverError             a driver file is wrong or a value is out of its limits
    ├── SafetyError             a cap of the bench file would be exceeded
    └── RunError                a run cannot start, continue or resume

The command line prints ``str(error)`` on one line and exits with
:attr:`LoopwrightError.exit_code` (2 for bad input, 1 otherwise).
"""

from __future__ import annotations

from pathlib import Path


class LoopwrightError(Exception):
    """Base of every error loopwright raises on purpose."""

    exit_code: int = 1


class InputError(LoopwrightError, ValueError):
    """A file or an argument is wrong.

    Parameters
    ----------
    message
        What is wrong and, where it helps, what is allowed.
    path
        The file the value came from, if any.
    line
        1-based line in that file, if known.
    field
        Dotted path of the offending field (``steps[2].start_hz``), if any.
    """

    exit_code = 2

    def __init__(
        self,
        message: str,
        *,
        path: str | Path | None = None,
        line: int | None = None,
        field: str | None = None,
    ) -> None:
        self.message = message
        self.path = None if path is None else str(path)
        self.line = line
        self.field = field
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = ""
        if self.path is not None:
            where = self.path
            if self.line is not None:
                where += f":{self.line}"
            where += ": "
        field = f"{self.field}: " if self.field else ""
        return f"{where}{field}{self.message}"


class EstimationError(LoopwrightError, ValueError):
    """Waveforms cannot be turned into a gain/phase point (too short, flat, NaN...)."""

    exit_code = 2


class AnalysisError(LoopwrightError, ValueError):
    """A frequency response cannot be analysed (too few points, unsorted...)."""

    exit_code = 2


class InstrumentError(LoopwrightError):
    """Talking to an instrument failed; the message names the resource."""


class InstrumentTimeout(InstrumentError):
    """An instrument did not answer within its timeout."""


class ConnectionLost(InstrumentError):
    """The connection to an instrument was refused, reset or dropped."""


class SCPIError(InstrumentError):
    """The instrument put an error on its SCPI error queue.

    Parameters
    ----------
    code
        The SCPI error number (negative for standard errors).
    text
        The instrument's own text for it.
    command
        The command after which the error was read, if known.
    """

    def __init__(self, code: int, text: str, command: str | None = None) -> None:
        self.code = code
        self.text = text
        self.command = command
        after = f" after {command!r}" if command else ""
        super().__init__(f"instrument reported error {code}, {text!r}{after}")


class DriverError(LoopwrightError):
    """A driver definition is wrong, or a value falls outside its limits."""

    exit_code = 2


class SafetyError(LoopwrightError):
    """A setting would exceed a cap of the bench file; nothing was sent."""

    exit_code = 2


class RunError(LoopwrightError):
    """A run cannot start, continue or resume."""
