"""Several runs side by side: one overlaid Bode plot and a table of figures with spread.

For boards of a batch, a board at several temperatures, or before and after a change.
The spread of each figure (mean, sample standard deviation with n - 1, min, max) is
taken over the runs where the figure exists; a run without it (no crossover in its
sweep) is left out of that figure's numbers, and the count says so.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence
from contextlib import nullcontext
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

import numpy as np
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

from loopwright.errors import InputError
from loopwright.report import bode
from loopwright.report import html as html_report
from loopwright.report.formatting import is_number
from loopwright.report.source import ReportInput, report_input

#: (key in summary.json["analysis"], column title, unit, decimals)
FIGURES: tuple[tuple[str, str, str, int], ...] = (
    ("phase_margin_deg", "phase margin", "deg", 2),
    ("phase_margin_frequency_hz", "gain crossover", "Hz", 1),
    ("gain_margin_db", "gain margin", "dB", 2),
    ("gain_margin_frequency_hz", "0° crossing", "Hz", 1),
    ("oscillation_frequency_hz", "predicted oscillation", "Hz", 1),
    ("excess_gain", "excess gain", "", 4),
    ("bandwidth_hz", "−3 dB bandwidth", "Hz", 1),
)


@dataclass(frozen=True)
class Spread:
    """Spread of one figure over the runs that have it."""

    count: int
    mean: float | None
    std: float | None
    min: float | None
    max: float | None


class ComparisonFiles(NamedTuple):
    """The files a comparison writes."""

    html: Path
    png: Path


def figure_values(summaries: Sequence[dict], key: str) -> list[float | None]:
    """The figure ``key`` of each run's analysis (None where a run has none)."""
    values = []
    for summary in summaries:
        value = (summary.get("analysis") or {}).get(key)
        values.append(float(value) if is_number(value) else None)
    return values


def spread(values: Sequence[float | None]) -> Spread:
    """mean, sample std (ddof=1; None with fewer than 2 values), min and max."""
    present = np.array([v for v in values if v is not None], dtype=float)
    if present.size == 0:
        return Spread(0, None, None, None, None)
    std = float(np.std(present, ddof=1)) if present.size >= 2 else None
    return Spread(int(present.size), float(np.mean(present)), std,
                  float(np.min(present)), float(np.max(present)))


def run_labels(runs: Sequence[ReportInput]) -> list[str]:
    """Serial numbers where they tell the runs apart, else the folder names."""
    serials = [str(r.manifest.get("serial") or "") for r in runs]
    if all(serials) and len(set(serials)) == len(serials):
        return serials
    return [r.path.name for r in runs]


def _number(value: float | None, unit: str, decimals: int) -> str:
    if value is None:
        return "–"
    text = f"{value:,.{decimals}f}".replace(",", "\u2009")
    return f"{text} {unit}".strip()


def comparison_html(runs: Sequence[ReportInput], labels: Sequence[str], svg: str) -> str:
    """The comparison document: overlay figure, per-run figures, spread."""
    esc = html_report.esc
    summaries = [r.summary for r in runs]
    header = ["run", "serial", "verdict"] + [f"{t} ({u})" if u else t
                                              for _, t, u, _ in FIGURES]
    rows = []
    for label, run in zip(labels, runs, strict=False):
        verdict = str(run.summary.get("verdict") or "none")
        shown = f"<strong>{esc(verdict)}</strong>" if verdict == "fail" else esc(verdict)
        row = [esc(label), esc(run.manifest.get("serial")), shown]
        for key, _, _, decimals in FIGURES:
            value = figure_values([run.summary], key)[0]
            row.append(esc(_number(value, "", decimals)))
        rows.append(row)
    per_run = html_report.table(header, rows, numeric=[False] * 3 + [True] * len(FIGURES),
                                row_classes=["failed-run" if r.summary.get("verdict") == "fail"
                                             else "" for r in runs])
    stats_rows = []
    for key, title, unit, decimals in FIGURES:
        s = spread(figure_values(summaries, key))
        stats_rows.append([esc(f"{title} ({unit})" if unit else title), esc(s.count),
                           esc(_number(s.mean, "", decimals + 1)),
                           esc(_number(s.std, "", decimals + 1)),
                           esc(_number(s.min, "", decimals)),
                           esc(_number(s.max, "", decimals))])
    stats = html_report.table(["figure", "runs with it", "mean", "std (n−1)", "min", "max"],
                              stats_rows, numeric=[False] + [True] * 5)
    folders = html_report.table(
        ["run", "folder", "started (UTC)", "operator", "station"],
        [[esc(label), esc(r.path.name), esc(r.manifest.get("started_utc")),
          esc(r.manifest.get("operator")), esc(r.manifest.get("station"))]
         for label, r in zip(labels, runs, strict=False)])
    title = f"Comparison of {len(runs)} runs"
    body = (
        f"<header><h1>{esc(title)}</h1><p class=\"sub\">Open-loop gain H = response / "
        "reference of each run on one plot; figures from each run's summary.json.</p>"
        "</header>"
        "<section id=\"overlay\"><h2>Overlaid Bode plot</h2>"
        + html_report.figure(svg, "Each run has its own colour and line style; circles: "
                             "gain crossovers (at 0 dB and at the phase margin); squares: "
                             "0° crossings (at 0° and at the loop gain there).")
        + "</section><section id=\"figures\"><h2>Figures per run</h2>" + per_run
        + "<h2>Spread</h2>" + stats + "</section>"
        + "<section id=\"runs\"><h2>Runs</h2>" + folders + "</section>"
    )
    return html_report.document(title, body)


def _progress(enabled: bool, console: Console | None):
    if not enabled:
        return nullcontext(None)
    return Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                    console=console or Console(file=sys.stderr), transient=console is None)


def render_comparison(
    run_dirs: Sequence[str | Path],
    out: str | Path = "comparison.html",
    progress: bool = False,
    console: Console | None = None,
) -> ComparisonFiles:
    """Overlay the runs of ``run_dirs`` and write ``out`` (HTML) and its PNG beside it.

    Parameters
    ----------
    run_dirs
        Two or more run folders (one is allowed, it gives a one-run table).
    out
        The HTML file; the PNG gets the same name with ``.png``.
    progress
        Show a progress bar (reading, then drawing, each run).
    console
        Where the bar goes (default: a rich console on stderr).
    """
    if not run_dirs:
        raise InputError("no run folders given to compare")
    out = Path(out)
    if out.suffix.lower() not in (".html", ".htm"):
        raise InputError("the output file must end in .html", path=out)
    if not out.parent.is_dir():
        raise InputError("the output folder does not exist", path=out.parent)
    with _progress(progress, console) as bar:
        task = None if bar is None else bar.add_task("reading runs", total=len(run_dirs))
        runs = []
        for run_dir in run_dirs:
            runs.append(report_input(run_dir))
            if bar is not None:
                bar.advance(task)
        labels = run_labels(runs)
        if bar is not None:
            task = bar.add_task("drawing runs", total=len(runs))
        fig = bode.overlay_figure(
            [(label, run.points, run.summary.get("analysis"))
             for label, run in zip(labels, runs, strict=False)],
            title=f"Open-loop gain H of {len(runs)} runs",
            on_run=None if bar is None else (lambda _label: bar.advance(task)),
        )
        text = comparison_html(runs, labels, bode.svg_text(fig, "overlay-"))
        try:
            png = bode.save_png(fig, out.with_suffix(".png"))
            out.write_text(text, encoding="utf-8")
        except OSError as exc:
            raise InputError(f"cannot write the comparison: {exc.strerror or exc}",
                             path=exc.filename or out) from exc
    return ComparisonFiles(html=out, png=png)
