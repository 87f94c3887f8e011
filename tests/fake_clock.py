"""A clock for ``SimulatedBench(clock=...)`` that moves only when a test moves it."""

from __future__ import annotations


class FakeClock:
    """A clock that moves only when told (seconds).

    Parameters
    ----------
    start_s : float
        The reading before the first ``advance``.
    """

    def __init__(self, start_s: float = 1000.0) -> None:
        self.now_s = start_s

    def __call__(self) -> float:
        return self.now_s

    def advance(self, seconds: float) -> None:
        """Move the clock forward."""
        self.now_s += seconds
