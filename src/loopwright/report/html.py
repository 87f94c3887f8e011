"""The self-contained HTML report of one run, and the HTML shell the comparison uses.

One file: inline CSS and inline SVG figures, no scripts, no fonts, no images, no
links to anywhere. Every string taken from a run's files (serials, names, IDN
replies, procedure text) goes through :func:`html.escape`. Print CSS keeps figures
and tables whole where they fit and repeats table headers across pages; the page
margins suit A4 and Letter alike (no fixed paper size).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Mapping, Sequence
from html import escape
from typing import Any

import numpy as np
import pandas as pd

from loopwright.report import palette
from loopwright.report.formatting import degrees, engineering, figure_value, fixed, is_number

CSS = f"""
:root {{ color-scheme: light; }}
* {{ box-sizing: border-box; }}
body {{ font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans",
  "Liberation Sans", Arial, sans-serif; color: #111; background: #fff; margin: 0 auto;
  max-width: 1100px; padding: 18px 24px; font-size: 14px; line-height: 1.4; }}
h1 {{ font-size: 22px; margin: 0 0 4px 0; }}
h2 {{ font-size: 17px; margin: 22px 0 8px 0; border-bottom: 1px solid #999;
  padding-bottom: 3px; break-after: avoid; page-break-after: avoid; }}
h3 {{ font-size: 14px; margin: 12px 0 6px 0; break-after: avoid; }}
p.sub {{ margin: 0 0 12px 0; color: #333; }}
table {{ border-collapse: collapse; margin: 6px 0 10px 0; font-size: 12.5px; }}
th, td {{ border: 1px solid #B0B0B0; padding: 3px 7px; text-align: left;
  vertical-align: top; }}
th {{ background: #EFEFEF; }}
td.num, th.num {{ text-align: right; font-variant-numeric: tabular-nums; }}
td.num {{ white-space: nowrap; }}
thead {{ display: table-header-group; }}
tr {{ break-inside: avoid; page-break-inside: avoid; }}
.banner {{ border: 3px solid; padding: 10px 14px; margin: 12px 0; }}
.banner .word {{ font-size: 24px; font-weight: 700; letter-spacing: 0.08em; }}
.banner.pass {{ border-color: {palette.PASS_COLOUR}; background: #E6F5F0; }}
.banner.fail {{ border-color: {palette.FAIL_COLOUR}; background: #FBEDE3;
  border-style: double; border-width: 6px; }}
.banner.none {{ border-color: {palette.NONE_COLOUR}; background: #F2F2F2;
  border-style: dashed; }}
tr.pass td:last-child {{ color: #00664A; font-weight: 600; }}
tr.fail td {{ background: #FBEDE3; }}
tr.fail td:last-child {{ color: #9A3D00; }}
tr.failed-run td {{ background: #FBEDE3; }}
figure {{ margin: 8px 0 14px 0; break-inside: avoid; page-break-inside: avoid; }}
figure svg {{ width: 100%; height: auto; display: block; }}
figcaption {{ font-size: 12px; color: #333; margin-top: 4px; }}
pre {{ background: #F6F6F6; border: 1px solid #CCC; padding: 8px; font-size: 11px;
  white-space: pre-wrap; word-break: break-word; }}
tr.flagged td {{ background: #FFF3DC; }}
.muted {{ color: #555; }}
section {{ break-inside: auto; }}
@page {{ margin: 14mm 12mm; }}
@media print {{
  body {{ max-width: none; padding: 0; font-size: 11px; }}
  h2 {{ margin-top: 14px; }}
  section.newpage {{ break-before: page; page-break-before: always; }}
  pre {{ font-size: 9px; }}
  table {{ font-size: 10px; }}
}}
"""


def esc(value: object) -> str:
    """Any value as escaped HTML text (None as an en dash)."""
    if value is None:
        return "–"
    return escape(str(value), quote=True)


def document(title: str, body: str) -> str:
    """A complete HTML5 document with the report CSS."""
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        f"<title>{esc(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n"
        f"{body}\n</body>\n</html>\n"
    )


def table(
    header: Sequence[str],
    rows: Iterable[Sequence[str]],
    numeric: Sequence[bool] | None = None,
    row_classes: Iterable[str] | None = None,
) -> str:
    """An HTML table; cells are already-escaped HTML strings."""
    numeric = numeric or [False] * len(header)
    head = "".join(f'<th class="num">{h}</th>' if n else f"<th>{h}</th>"
                   for h, n in zip(header, numeric, strict=False))
    classes = iter(row_classes) if row_classes is not None else None
    lines = []
    for row in rows:
        css = next(classes) if classes is not None else ""
        cells = "".join(f'<td class="num">{c}</td>' if n else f"<td>{c}</td>"
                        for c, n in zip(row, numeric, strict=False))
        attr = f' class="{css}"' if css else ""
        lines.append(f"<tr{attr}>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(lines)}</tbody></table>"


def figure(svg: str, caption: str) -> str:
    """An inline SVG figure with its (escaped) caption."""
    return f"<figure>{svg}<figcaption>{esc(caption)}</figcaption></figure>"


# --- sections of one run's report -------------------------------------------------


def verdict_section(summary: Mapping[str, Any]) -> str:
    """The verdict banner and the table of every limit with its value and margin."""
    verdict = str(summary.get("verdict") or "none").lower()
    if verdict not in ("pass", "fail"):
        verdict = "none"
    limits = summary.get("limits") or []
    failed = sum(1 for limit in limits if limit.get("passed") is False)
    word = {"pass": "PASS", "fail": "FAIL", "none": "NO LIMITS CHECKED"}[verdict]
    detail = {
        "pass": f"all {len(limits)} limit(s) met",
        "fail": f"{failed} of {len(limits)} limit(s) not met",
        "none": "the procedure set no limits, or the run ended before they were checked",
    }[verdict]
    rows = []
    classes = []
    for limit in limits:
        unit = limit.get("unit")
        passed = limit.get("passed")
        result = "pass" if passed is True else "fail" if passed is False else "not evaluated"
        classes.append("pass" if passed is True else "fail" if passed is False else "")
        rows.append([
            esc(limit.get("name")),
            esc(limit.get("figure")),
            esc(figure_value(limit.get("min"), unit) if is_number(limit.get("min")) else "–"),
            esc(figure_value(limit.get("max"), unit) if is_number(limit.get("max")) else "–"),
            esc(figure_value(limit.get("value"), unit)),
            esc(figure_value(limit.get("margin"), unit)),
            f"<strong>{esc(result)}</strong>" if passed is False else esc(result),
        ])
    body = (
        f'<div class="banner {verdict}"><span class="word">{word}</span> '
        f"<span>{esc(detail)}</span></div>"
    )
    if rows:
        body += table(["limit", "figure", "min", "max", "value", "margin", "result"], rows,
                      numeric=[False, False, True, True, True, True, False],
                      row_classes=classes)
    return f'<section id="verdict"><h2>Verdict</h2>{body}</section>'


def figures_section(analysis: Mapping[str, Any]) -> str:
    """Tables of the loop figures of ``summary.json["analysis"]``."""
    parts = []
    osc = analysis.get("oscillation_predicted")
    worst = [
        ["phase margin (worst)", esc(degrees(analysis.get("phase_margin_deg"))),
         esc(degrees(analysis.get("phase_margin_deg_std"), 3)),
         esc(engineering(analysis.get("phase_margin_frequency_hz"), "Hz", 6))],
        ["gain margin (worst)", esc(fixed(analysis.get("gain_margin_db"), 2, "dB")),
         esc(fixed(analysis.get("gain_margin_db_std"), 3, "dB")),
         esc(engineering(analysis.get("gain_margin_frequency_hz"), "Hz", 6))],
        ["oscillation predicted (Barkhausen)",
         "yes" if osc else "no",
         "",
         esc(engineering(analysis.get("oscillation_frequency_hz"), "Hz", 6)) if osc else "–"],
        ["excess gain", esc(fixed(analysis.get("excess_gain"), 4)), "", ""],
        ["−3 dB bandwidth", esc(engineering(analysis.get("bandwidth_hz"), "Hz", 5)), "", ""],
    ]
    parts.append(table(["figure", "value", "±1σ", "at"], worst,
                       numeric=[False, True, True, True]))
    method, why = analysis.get("interpolation"), analysis.get("interpolation_note")
    if method:
        detail = f": {esc(why)}" if why else ""
        parts.append(f'<p class="muted">Between points: {esc(method)}{detail}</p>')
    crossovers = analysis.get("gain_crossovers") or []
    if crossovers:
        parts.append("<h3>Gain crossovers (|H| = 1)</h3>")
        parts.append(table(
            ["frequency", "phase margin"],
            [[esc(engineering(c.get("frequency_hz"), "Hz", 6)),
              esc(degrees(c.get("phase_margin_deg")))] for c in crossovers],
            numeric=[True, True]))
    zeros = analysis.get("zero_phase_crossings") or []
    if zeros:
        parts.append("<h3>0° crossings (∠H = 0)</h3>")
        parts.append(table(
            ["frequency", "loop gain |H|", "gain margin", "Barkhausen criterion", "excess gain"],
            [[esc(engineering(z.get("frequency_hz"), "Hz", 6)),
              esc(fixed(z.get("loop_gain"), 4)),
              esc(fixed(z.get("gain_margin_db"), 2, "dB")),
              "met: oscillation predicted" if z.get("barkhausen_met") else "not met",
              esc(fixed(z.get("excess_gain"), 4))] for z in zeros],
            numeric=[True, True, True, False, True]))
    resonances = analysis.get("resonances") or []
    if resonances:
        parts.append("<h3>Resonances</h3>")
        parts.append(table(
            ["frequency", "peak", "Q"],
            [[esc(engineering(r.get("frequency_hz"), "Hz", 6)),
              esc(fixed(r.get("peak_db"), 2, "dB")), esc(fixed(r.get("q"), 2))]
             for r in resonances],
            numeric=[True, True, True]))
    return "".join(parts)


def closed_loop_section(closed_loop: Mapping[str, Any] | None, svg: str | None) -> str:
    """The free-running check: figures against the open-loop prediction, and the plot."""
    if not closed_loop and svg is None:
        return ""
    closed_loop = closed_loop or {}
    rows = [
        ["measured frequency", esc(engineering(closed_loop.get("frequency_hz"), "Hz", 6))],
        ["open-loop prediction",
         esc(engineering(closed_loop.get("predicted_frequency_hz"), "Hz", 6))],
        ["frequency error", esc(fixed(closed_loop.get("frequency_error_pct"), 3, "%"))],
        ["amplitude", esc(engineering(closed_loop.get("amplitude_v"), "V"))],
        ["THD", esc(fixed(closed_loop.get("thd_pct"), 3, "%"))],
    ]
    body = table(["figure", "value"], rows, numeric=[False, True])
    if svg is not None:
        body += figure(svg, "The loop closed and running free: a few cycles of the "
                       "response and its spectrum, with the measured frequency and the "
                       "frequency the open-loop sweep predicted.")
    return f'<section id="closed-loop"><h2>Closed-loop check</h2>{body}</section>'


def calibration_section(calibration: pd.DataFrame | None, svg: str | None) -> str:
    """The channel mismatch the sweep divided out."""
    if calibration is None:
        return ""
    db = calibration["mismatch_db"].to_numpy(dtype=float)
    deg = calibration["mismatch_deg"].to_numpy(dtype=float)
    rows = [[
        esc(f"{len(calibration)}"),
        esc(engineering(float(calibration['frequency_hz'].min()), "Hz")),
        esc(engineering(float(calibration['frequency_hz'].max()), "Hz")),
        esc(fixed(float(np.max(np.abs(db))), 3, "dB")),
        esc(degrees(float(np.max(np.abs(deg))), 3)),
    ]]
    body = ("<p>Both probes on one node; the mismatch (channel 2 / channel 1) is divided "
            "out of the sweeps that followed.</p>")
    body += table(["points", "from", "to", "largest |gain mismatch|",
                   "largest |phase mismatch|"], rows, numeric=[True] * 5)
    if svg is not None:
        body += figure(svg, "Channel calibration: gain and phase mismatch over frequency.")
    return f'<section id="calibration"><h2>Channel calibration</h2>{body}</section>'


def _json_block(value: Any) -> str:
    return f"<pre>{esc(json.dumps(value, indent=2, sort_keys=False, default=str))}</pre>"


def provenance_section(manifest: Mapping[str, Any]) -> str:
    """Who, where, when and with what the run was made; procedure and bench as run."""
    rows = [
        ["serial", esc(manifest.get("serial"))],
        ["operator", esc(manifest.get("operator"))],
        ["station", esc(manifest.get("station"))],
        ["host", esc(manifest.get("host"))],
        ["software version", esc(manifest.get("software_version"))],
        ["started (UTC)", esc(manifest.get("started_utc"))],
        ["ended (UTC)", esc(manifest.get("ended_utc"))],
        ["status", esc(manifest.get("status"))
         + (f" ({esc(manifest.get('reason'))})" if manifest.get("reason") else "")],
        ["procedure file", esc(manifest.get("procedure_file"))],
        ["procedure SHA-256", f"<code>{esc(manifest.get('procedure_sha256'))}</code>"],
        ["run format", esc(manifest.get("format"))],
    ]
    for key, label in (("replay_of", "replay of"), ("reanalysis_of", "re-analysis of"),
                       ("calibration", "calibration from")):
        if manifest.get(key):
            rows.append([label, esc(manifest.get(key))])
    body = table(["field", "value"], rows)
    instruments = manifest.get("instruments") or {}
    if instruments:
        body += "<h3>Instruments</h3>"
        body += table(
            ["role", "resource", "*IDN? reply", "driver"],
            [[esc(role), esc((info or {}).get("resource")), esc((info or {}).get("idn")),
              esc((info or {}).get("driver"))] for role, info in instruments.items()])
    procedure = manifest.get("procedure")
    if procedure is not None:
        text = json.dumps(procedure, sort_keys=True, separators=(",", ":"), default=str)
        digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
        body += ("<h3>Procedure as run</h3>"
                 f"<p class=\"muted\">SHA-256 of the procedure as run (canonical JSON): "
                 f"<code>{digest}</code></p>" + _json_block(procedure))
    if manifest.get("bench") is not None:
        body += "<h3>Bench as run</h3>" + _json_block(manifest.get("bench"))
    return f'<section id="provenance" class="newpage"><h2>Provenance</h2>{body}</section>'


def _cell(points: pd.DataFrame, column: str, index: int, decimals: int) -> str:
    if column not in points.columns:
        return "–"
    return esc(fixed(pd.to_numeric(points[column].iloc[index], errors="coerce"), decimals))


def points_section(points: pd.DataFrame) -> str:
    """Every measured point, flagged rows marked by a tint and by their flag names."""
    rows, classes = [], []
    for i in range(len(points)):
        flags = points["flags"].iloc[i] if "flags" in points.columns else ""
        flags = "" if not isinstance(flags, str) else flags
        names = [palette.FLAG_STYLES.get(f, {"label": f})["label"]
                 for f in flags.split(";") if f]
        refined = points["refined"].iloc[i] if "refined" in points.columns else 0
        rows.append([
            esc(points["index"].iloc[i] if "index" in points.columns else i),
            esc(engineering(float(points["frequency_hz"].iloc[i]), "Hz", 6)),
            _cell(points, "gain_db", i, 3),
            _cell(points, "gain_db_std", i, 3),
            _cell(points, "phase_deg", i, 2),
            _cell(points, "phase_deg_std", i, 2),
            _cell(points, "reference_snr_db", i, 1),
            _cell(points, "response_snr_db", i, 1),
            _cell(points, "response_thd_pct", i, 3),
            "yes" if str(refined) in ("1", "1.0", "True", "true") else "",
            esc(", ".join(names)),
        ])
        classes.append("flagged" if names else "")
    flagged = sum(1 for c in classes if c)
    body = (f"<p>{len(points)} points, {flagged} flagged. Flagged rows are tinted and "
            "name their flags.</p>")
    body += table(
        ["#", "frequency", "gain (dB)", "σ gain (dB)", "phase (deg)", "σ phase (deg)",
         "SNR ref (dB)", "SNR resp (dB)", "THD resp (%)", "refined", "flags"],
        rows, numeric=[True] * 9 + [False, False], row_classes=classes)
    return f'<section id="points" class="newpage"><h2>Points</h2>{body}</section>'


def run_report(
    *,
    manifest: Mapping[str, Any],
    summary: Mapping[str, Any],
    points: pd.DataFrame,
    bode_svg: str,
    closed_loop_svg: str | None,
    calibration: pd.DataFrame | None,
    calibration_svg: str | None,
) -> str:
    """The complete HTML report of one run."""
    serial = manifest.get("serial")
    procedure = manifest.get("procedure") or {}
    name = procedure.get("name") if isinstance(procedure, Mapping) else None
    title = f"Loop gain report: {serial or 'no serial'}"
    analysis = summary.get("analysis") or {}
    sub = (f"procedure {esc(name or manifest.get('procedure_file'))} · "
           f"started {esc(manifest.get('started_utc'))} UTC · "
           f"status {esc(manifest.get('status'))} · {len(points)} points")
    body = [
        f"<header><h1>{esc(title)}</h1><p class=\"sub\">{sub}</p></header>",
        verdict_section(summary),
        '<section id="bode"><h2>Open-loop gain and phase</h2>',
        figure(bode_svg, "Bode plot of H = response / reference (the round trip around "
               "the loop, every inversion included). Bands: ±2σ per-point uncertainty; "
               "dotted verticals: gain crossovers; dashed verticals: 0° crossings; "
               "hatched: outside a limit."),
        figures_section(analysis) if analysis else "<p>No analysis in summary.json.</p>",
        "</section>",
        closed_loop_section(summary.get("closed_loop"), closed_loop_svg),
        calibration_section(calibration, calibration_svg),
        provenance_section(manifest),
        points_section(points),
    ]
    return document(title, "\n".join(part for part in body if part))
