"""Reports of runs: Bode plots, the self-contained HTML report, comparisons, exports.

Public API
----------
- :func:`render_report` (run folder -> report.html, bode.png, bode.svg in it)
- :func:`loopwright.report.compare.render_comparison` (several runs -> one HTML + PNG)
- :func:`loopwright.report.export.export_run` (run folder -> CSV or JSON)
"""

from __future__ import annotations

from pathlib import Path
from typing import NamedTuple

from loopwright.errors import InputError
from loopwright.report import bode, evidence
from loopwright.report import html as html_report
from loopwright.report.source import ReportInput, report_input

__all__ = ["ReportFiles", "render_report", "render_report_input"]


class ReportFiles(NamedTuple):
    """The files one report writes into its run folder."""

    html: Path
    png: Path
    svg: Path


def _title(data: ReportInput) -> str:
    procedure = data.manifest.get("procedure") or {}
    name = procedure.get("name") if isinstance(procedure, dict) else None
    parts = [f"serial {data.manifest.get('serial') or '–'}"]
    if name:
        parts.append(f"procedure {name}")
    return "Open-loop gain H = response / reference · " + " · ".join(parts)


def render_report_input(data: ReportInput) -> ReportFiles:
    """Write report.html, bode.png and bode.svg for already-read run data.

    Raises
    ------
    InputError
        A file cannot be written into the run folder (read-only, disk full).
    """
    try:
        return _render(data)
    except OSError as exc:
        raise InputError(f"cannot write the report: {exc.strerror or exc}",
                         path=exc.filename or data.path) from exc


def _render(data: ReportInput) -> ReportFiles:
    summary = data.summary
    analysis = summary.get("analysis") or {}
    limits = summary.get("limits") or []
    bode_fig = bode.bode_figure(data.points, analysis, limits, title=_title(data))
    png = bode.save_png(bode_fig, data.path / "bode.png")
    svg_document = bode.svg_document(bode_fig)
    svg = data.path / "bode.svg"
    svg.write_text(svg_document, encoding="utf-8")
    bode_inline = bode.inline_svg(svg_document, "bode-")

    closed_loop_svg = None
    if data.closed_loop_time_s is not None:
        fig = evidence.closed_loop_figure(data.closed_loop_time_s, data.closed_loop_response_v,
                                          summary.get("closed_loop"), limits)
        closed_loop_svg = bode.svg_text(fig, "closed-")
    calibration_svg = None
    if data.calibration is not None:
        calibration_svg = bode.svg_text(evidence.calibration_figure(data.calibration), "cal-")

    text = html_report.run_report(
        manifest=data.manifest,
        summary=summary,
        points=data.points,
        bode_svg=bode_inline,
        closed_loop_svg=closed_loop_svg,
        calibration=data.calibration,
        calibration_svg=calibration_svg,
    )
    html_path = data.path / "report.html"
    html_path.write_text(text, encoding="utf-8")
    return ReportFiles(html=html_path, png=png, svg=svg)


def render_report(run_dir: str | Path) -> ReportFiles:
    """Render the report of the run folder ``run_dir`` from its files alone.

    Writes ``report.html`` (self-contained: inline CSS and SVG, no scripts, no outside
    references), ``bode.png`` and ``bode.svg`` into the folder.

    Raises
    ------
    InputError
        ``run_dir`` is not a run folder, or a file in it is unreadable or malformed.
    """
    return render_report_input(report_input(run_dir))
