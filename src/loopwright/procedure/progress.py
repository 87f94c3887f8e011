"""What a run shows while it works.

A rich progress bar with ETA, the present frequency and the last point's gain, phase
and flags on a terminal; plain log lines (one per point) when stdout is not a
terminal, so an overnight log file stays readable; nothing with ``quiet``.
"""

from __future__ import annotations

from rich.console import Console
from rich.markup import escape
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)


def format_frequency(frequency_hz: float) -> str:
    """``12345.6`` -> ``12.35 kHz``."""
    for factor, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(frequency_hz) >= factor:
            return f"{frequency_hz / factor:.4g} {unit}"
    return f"{frequency_hz:.4g} Hz"


class RunProgress:
    """Progress of one run.

    Parameters
    ----------
    console
        Where to show it.
    quiet
        Show nothing but warnings.
    """

    def __init__(self, console: Console, quiet: bool = False) -> None:
        self.console = console
        self.quiet = quiet
        self.live = console.is_terminal and not quiet
        self._progress: Progress | None = None
        self._task = None

    def __enter__(self) -> RunProgress:
        if self.live:
            self._progress = Progress(
                TextColumn("[bold]{task.description}"),
                BarColumn(),
                MofNCompleteColumn(),
                TimeElapsedColumn(),
                TextColumn("ETA"),
                TimeRemainingColumn(),
                TextColumn("{task.fields[last]}"),
                console=self.console,
                transient=False,
            )
            self._progress.__enter__()
        return self

    def __exit__(self, *exc: object) -> None:
        if self._progress is not None:
            self._progress.__exit__(None, None, None)
            self._progress = None

    def start_step(self, description: str, total: int) -> None:
        """A new step with ``total`` planned points."""
        if self._progress is not None:
            # labels come from files: shown as text, never read as rich markup
            self._task = self._progress.add_task(escape(description), total=total, last="")
        elif not self.quiet:
            self.console.print(f"{escape(description)}: {total} points planned",
                               highlight=False)

    def add_planned(self, extra: int) -> None:
        """Adaptive refinement added points to the present step."""
        if self._progress is not None and self._task is not None:
            task = self._progress.tasks[self._task]
            self._progress.update(self._task, total=(task.total or 0) + extra)
        elif not self.quiet:
            self.console.print(f"  refinement adds {extra} points", highlight=False)

    def point(self, index: int, frequency_hz: float, gain_db: float, phase_deg: float,
              flags: list[str]) -> None:
        """One point was measured and stored (``index`` -1: a calibration point, which
        goes to calibration.csv at the end of its step)."""
        flag_text = ",".join(flags) if flags else "ok"
        text = (f"{format_frequency(frequency_hz):>11}  {gain_db:+8.2f} dB  "
                f"{phase_deg:+8.2f} deg  {flag_text}")
        if self._progress is not None and self._task is not None:
            self._progress.update(self._task, advance=1, last=text)
        elif not self.quiet:
            self.console.print(f"  point {index:5d} {text}", highlight=False)

    def message(self, text: str) -> None:
        """A line for the operator, hidden in quiet mode (use :meth:`warn` for a warning)."""
        if not self.quiet:
            self.console.print(text, highlight=False, markup=False)

    def warn(self, text: str) -> None:
        """A warning, always shown."""
        self.console.print(f"[bold yellow]warning:[/] {escape(text)}")
