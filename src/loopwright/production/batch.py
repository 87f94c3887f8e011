"""The operator loop of a production batch: serial in, verdict out, next board.

:func:`run_batch` asks for a board serial (typed, or a barcode scanner's line), runs
the procedure on that board through an injected ``run_one`` callable (the runner),
shows a large PASS or FAIL with the failing limits and their values, adds the run to
the results index and one line to ``batch.csv``, and asks for the next serial. An
empty line, the end of the input or Ctrl-C ends the batch; the summary is returned.

``run_one(serial, *, retest, out_dir) -> (run_dir, summary)`` measures one board and
writes its run folder (``summary`` is the content of its ``summary.json``, or None
when the run ended without one; Ctrl-C during a run arrives as KeyboardInterrupt). It is
expected to turn the generator output off itself, also on error or Ctrl-C.
"""

from __future__ import annotations

import csv
import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol, TextIO

from rich.align import Align
from rich.console import Console, Group
from rich.markup import escape
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from loopwright.errors import InputError, LoopwrightError
from loopwright.production.index import ResultsIndex, open_index, record_from_run_folder, utc_now
from loopwright.production.serials import clean_serial

#: Name of the batch record inside the output folder.
BATCH_RECORD_NAME = "batch.csv"
#: Columns of ``batch.csv``, in order.
BATCH_COLUMNS = (
    "time_utc", "serial", "station", "operator", "retest", "verdict",
    "in_index", "failed_limits", "run_id", "run_dir", "message",
)


class RunOne(Protocol):
    """The runner as the batch loop sees it."""

    def __call__(
        self, serial: str, *, retest: bool, out_dir: Path
    ) -> tuple[Path | str, dict[str, Any] | None]: ...


@dataclass
class BoardResult:
    """One board of a batch."""

    serial: str
    retest: bool
    verdict: str  # "pass", "fail", "none" or "error"
    run_dir: str | None = None
    run_id: str | None = None
    failed_limits: list[dict[str, Any]] = field(default_factory=list)
    message: str | None = None


@dataclass
class BatchSummary:
    """What a batch did; ``ended_by`` is ``empty line``, ``end of input`` or ``interrupt``."""

    boards: list[BoardResult]
    ended_by: str
    batch_record: Path
    index_location: str

    @property
    def passed(self) -> int:
        return sum(b.verdict == "pass" for b in self.boards)

    @property
    def failed(self) -> int:
        return sum(b.verdict == "fail" for b in self.boards)

    @property
    def errors(self) -> int:
        return sum(b.verdict == "error" for b in self.boards)

    @property
    def retests(self) -> int:
        return sum(b.retest for b in self.boards)


# ---------------------------------------------------------------- big words

# A 5-row block font of our own, only the letters the verdicts need.
_FONT = {
    "P": ["████ ", "█   █", "████ ", "█    ", "█    "],
    "A": [" ███ ", "█   █", "█████", "█   █", "█   █"],
    "S": [" ████", "█    ", " ███ ", "    █", "████ "],
    "F": ["█████", "█    ", "████ ", "█    ", "█    "],
    "I": ["█████", "  █  ", "  █  ", "  █  ", "█████"],
    "L": ["█    ", "█    ", "█    ", "█    ", "█████"],
    "E": ["█████", "█    ", "████ ", "█    ", "█████"],
    "R": ["████ ", "█   █", "████ ", "█  █ ", "█   █"],
    "O": [" ███ ", "█   █", "█   █", "█   █", " ███ "],
    "D": ["████ ", "█   █", "█   █", "█   █", "████ "],
    "N": ["█   █", "██  █", "█ █ █", "█  ██", "█   █"],
    " ": ["   ", "   ", "   ", "   ", "   "],
}


def big_word(word: str) -> str:
    """``word`` in 5-row block letters (letters of PASS, FAIL, ERROR, DONE)."""
    rows = ["", "", "", "", ""]
    for ch in word.upper():
        glyph = _FONT.get(ch)
        if glyph is None:
            raise ValueError(f"no block letter for {ch!r}")
        rows = [r + g + "  " for r, g in zip(rows, glyph, strict=True)]
    # Equal-length rows (no rstrip), so centring keeps the letters aligned.
    return "\n".join(r[:-2] for r in rows)


_LOOK = {
    "pass": ("PASS", "bold white on green", "green"),
    "fail": ("FAIL", "bold white on red", "red"),
    "none": ("DONE", "bold black on yellow", "yellow"),
    "error": ("ERROR", "bold white on magenta", "magenta"),
}


def verdict_panel(result: BoardResult) -> Panel:
    """The large verdict shown to the operator: colour, block letters and the word."""
    word, style, border = _LOOK.get(result.verdict, _LOOK["error"])
    parts: list[Any] = [Align.center(Text(big_word(word), style=style))]
    retest = "  (RETEST: this serial was tested before)" if result.retest else ""
    parts.append(Text(f"\n{word}: board {result.serial}{retest}", style=f"bold {border}"))
    if result.verdict == "none":
        parts.append(Text("the procedure has no limits; nothing was judged"))
    if result.failed_limits:
        table = Table(title="failing limits", expand=False)
        for name in ("limit", "value", "min", "max", "unit"):
            table.add_column(name, justify="left" if name in ("limit", "unit") else "right")
        for lim in result.failed_limits:
            table.add_row(
                Text(str(lim.get("name") or lim.get("figure"))),
                _fmt(lim.get("value")),
                _fmt(lim.get("min")),
                _fmt(lim.get("max")),
                Text(str(lim.get("unit") or "")),
            )
        parts.append(table)
    if result.message:
        parts.append(Text(result.message, style="bold"))
    return Panel(Group(*parts), title=word, border_style=border, expand=True)


def _fmt(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


# ---------------------------------------------------------------- the batch record


def append_batch_record(path: Path, row: dict[str, Any]) -> None:
    """Append one line to ``batch.csv`` (header first if new), flushed and fsynced."""
    new = not path.exists() or path.stat().st_size == 0
    with path.open("a", encoding="utf-8", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=BATCH_COLUMNS)
        if new:
            writer.writeheader()
        writer.writerow({k: row.get(k, "") for k in BATCH_COLUMNS})
        fh.flush()
        os.fsync(fh.fileno())


def failed_limits(summary: dict[str, Any]) -> list[dict[str, Any]]:
    """The limits of a summary that did not pass (``passed`` false)."""
    limits = summary.get("limits") or []
    return [lim for lim in limits if isinstance(lim, dict) and lim.get("passed") is False]


# ---------------------------------------------------------------- the loop


def _is_terminal(stream: TextIO) -> bool:
    isatty = getattr(stream, "isatty", None)
    return bool(isatty and isatty())


def _read_line(stream: TextIO) -> str | None:
    """One line, or None at end of input."""
    line = stream.readline()
    return None if line == "" else line


def run_batch(
    procedure_path: str | Path,
    bench_path: str | Path,
    *,
    station: str,
    operator: str | None,
    out_dir: str | Path,
    index_url: str | None,
    input_stream: TextIO,
    console: Console,
    run_one: RunOne | Callable[..., tuple[Path | str, dict[str, Any]]],
) -> BatchSummary:
    """Run boards one after another until the operator stops.

    Parameters
    ----------
    procedure_path, bench_path
        The procedure and bench files (checked to exist; shown in the header; the
        runner behind ``run_one`` reads them).
    station, operator
        Recorded with every run.
    out_dir
        Where run folders, ``batch.csv`` and (by default) ``index.sqlite`` go.
    index_url
        ``None`` for ``out_dir/index.sqlite``, else a URL or path (see
        :func:`loopwright.production.index.resolve_index_url`).
    input_stream
        Where serials come from (``sys.stdin`` on a station; a text stream in tests).
    console
        Where prompts and verdicts go.
    run_one
        ``run_one(serial, *, retest, out_dir) -> (run_dir, summary)``.

    Returns
    -------
    BatchSummary

    Raises
    ------
    InputError
        Missing procedure or bench file, bad index URL.
    ResultsIndexError
        The index cannot be opened at the start (nothing is measured then).
    """
    for path, what in ((procedure_path, "procedure"), (bench_path, "bench")):
        if not Path(path).is_file():
            raise InputError(f"{what} file not found", path=path)
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the output folder: {exc}", path=out) from exc
    record_path = out / BATCH_RECORD_NAME
    index = open_index(index_url if index_url is not None else out)
    boards: list[BoardResult] = []
    ended_by = "end of input"
    try:
        console.print(
            Panel(
                Text(  # paths and names as typed: text, never markup
                    f"procedure  {procedure_path}\nbench      {bench_path}\n"
                    f"station    {station}\noperator   {operator or '-'}\n"
                    f"output     {out}\nindex      {index.where}"
                ),
                title="batch",
            )
        )
        while True:
            console.print(
                "[bold]Board serial[/bold] (scan or type; empty line ends the batch): ", end=""
            )
            try:
                line = _read_line(input_stream)
            except KeyboardInterrupt:
                ended_by = "interrupt"
                break
            if line is None:
                ended_by = "end of input"
                break
            if not _is_terminal(input_stream):
                console.print(line.strip(), highlight=False, markup=False)  # echo input
            try:
                serial = clean_serial(line)
            except InputError as exc:
                console.print(f"[red]{escape(str(exc))}[/red] Scan again.")
                continue
            if not serial:
                ended_by = "empty line"
                break
            try:
                result = _one_board(
                    serial, index, run_one, out, station=station, operator=operator
                )
            except KeyboardInterrupt:
                result = BoardResult(
                    serial, False, "error", message="interrupted; the batch ends here"
                )
                ended_by = "interrupt"
            boards.append(result)
            append_batch_record(record_path, _record_row(result, station, operator))
            console.print(verdict_panel(result))
            if ended_by == "interrupt":
                break
    finally:
        index.close()
    summary = BatchSummary(boards, ended_by, record_path, index.where)
    console.print(
        f"Batch ended ({ended_by}): {len(boards)} boards, {summary.passed} pass, "
        f"{summary.failed} fail, {summary.errors} error, {summary.retests} retests. "
        f"Record: {record_path}",
        markup=False,
    )
    return summary


def _one_board(
    serial: str,
    index: ResultsIndex,
    run_one: Callable[..., tuple[Path | str, dict[str, Any]]],
    out: Path,
    *,
    station: str,
    operator: str | None,
) -> BoardResult:
    """Measure one board, index it, and say what happened (errors become a result)."""
    try:
        retest = index.serial_runs(serial) > 0
    except LoopwrightError as exc:
        retest = False
        index_problem: str | None = f"retest check failed: {exc}"
    else:
        index_problem = None
    try:
        run_dir, summary = run_one(serial, retest=retest, out_dir=out)
    except LoopwrightError as exc:
        return BoardResult(serial, retest, "error", message=f"the run did not finish: {exc}")
    folder = Path(run_dir).resolve()
    if summary is None:  # the run ended without analysis (failed part-way)
        return BoardResult(
            serial, retest, "error", run_dir=str(folder),
            message=f"the run ended without a summary; see {folder / 'manifest.json'}",
        )
    if not folder.is_relative_to(out.resolve()):
        # The serial must never steer where files go; refuse to index such a run.
        return BoardResult(
            serial, retest, "error", run_dir=str(folder),
            message=f"the run folder {folder} is outside the output folder {out}; not indexed",
        )
    verdict = str(summary.get("verdict") or "none")
    result = BoardResult(
        serial,
        retest,
        verdict if verdict in ("pass", "fail", "none") else "error",
        run_dir=str(folder),
        failed_limits=failed_limits(summary),
    )
    try:
        record = record_from_run_folder(
            run_dir, summary=summary, serial=serial, station=station, operator=operator
        )
        result.run_id, _ = index.add_run(record, retest=retest)
    except LoopwrightError as exc:
        index_problem = (
            f"NOT in the index ({exc}); the run folder and batch.csv have it: "
            "add it later with `loopwright index add RUN_DIR`"
        )
    result.message = index_problem
    return result


def _record_row(result: BoardResult, station: str, operator: str | None) -> dict[str, Any]:
    return {
        "time_utc": utc_now().isoformat(timespec="seconds") + "Z",
        "serial": result.serial,
        "station": station,
        "operator": operator or "",
        "retest": int(result.retest),
        "verdict": result.verdict,
        "in_index": "yes" if result.run_id else "no",
        "failed_limits": ";".join(
            str(lim.get("name") or lim.get("figure")) for lim in result.failed_limits
        ),
        "run_id": result.run_id or "",
        "run_dir": result.run_dir or "",
        "message": result.message or "",
    }
