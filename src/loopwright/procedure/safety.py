"""The generator output goes off on every exit.

:class:`OutputGuard` wraps a run. Inside it, SIGTERM raises :class:`StopRequested`
(SIGINT raises KeyboardInterrupt as usual). On the way out (completion, error,
Ctrl-C, SIGTERM, a lost instrument) it switches the generator output off with both
signals held off, so a second Ctrl-C cannot skip that step; if the connection is gone
it reopens the generator once and tries again.
"""

from __future__ import annotations

import logging
import signal
import threading
from collections.abc import Callable
from types import FrameType, TracebackType

from loopwright.errors import LoopwrightError
from loopwright.instruments.roles import Generator

log = logging.getLogger(__name__)


class StopRequested(BaseException):
    """SIGTERM arrived; the run stops as after Ctrl-C (a BaseException like it)."""


class OutputGuard:
    """Context manager that leaves the generator output off whatever happens.

    Parameters
    ----------
    current
        Returns the generator role in use now (it changes when a lost connection is
        reopened during the run).
    reopen
        Opens the generator afresh (used when the connection is lost); optional.
    """

    def __init__(self, current: Callable[[], Generator],
                 reopen: Callable[[], Generator] | None = None) -> None:
        self.current = current
        self.reopen = reopen
        self.output_off_confirmed = False
        self._saved: dict[int, object] = {}

    def _on_sigterm(self, signum: int, frame: FrameType | None) -> None:
        raise StopRequested("SIGTERM")

    def __enter__(self) -> OutputGuard:
        if threading.current_thread() is threading.main_thread():
            self._saved[signal.SIGTERM] = signal.signal(signal.SIGTERM, self._on_sigterm)
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        main = threading.current_thread() is threading.main_thread()
        held = {}
        if main:
            for sig in (signal.SIGINT, signal.SIGTERM):
                held[sig] = signal.signal(sig, signal.SIG_IGN)
        try:
            self.output_off_confirmed = self.switch_off()
        finally:
            if main:
                for sig, handler in held.items():
                    signal.signal(sig, handler)
                if signal.SIGTERM in self._saved:
                    signal.signal(signal.SIGTERM, self._saved.pop(signal.SIGTERM))  # type: ignore[arg-type]

    def switch_off(self) -> bool:
        """Output off, reopening the generator once if needed; True when confirmed."""
        generator = self.current()
        for attempt in range(2):
            try:
                generator.set_output(False)
                return not generator.read_settings().output_on
            except (LoopwrightError, OSError) as exc:
                log.warning("switching the generator output off failed (%s)", exc)
                if attempt == 0 and self.reopen is not None:
                    try:
                        generator = self.reopen()
                    except (LoopwrightError, OSError) as reopen_exc:
                        log.error("could not reopen the generator: %s", reopen_exc)
                        return False
        return False
