"""Reports of runs: the HTML report, the Bode PNG/SVG, exports, comparisons.

Run folders are built in tmp_path from exact responses of invented loops (scipy.signal
evaluates H), written as the run-folder format says, with summary.json from the real
analysis module. External checks: python-control ``stability_margins`` (references.md,
"Stability margins"), html5lib's strict HTML5 parser, numpy's mean/std, pandas'
CSV reader, and a headless chromium rendering the report.
"""

from __future__ import annotations

import csv
import json
import math
import os
import re
import shutil
import subprocess
from pathlib import Path

import html5lib
import matplotlib.image as mpimg
import numpy as np
import pandas as pd
import pytest
from scipy import signal

from loopwright.analysis import FrequencyResponse, analyze_loop
from loopwright.cli import main
from loopwright.procedure.schema import Limit, evaluate_limits
from loopwright.report import palette, render_report
from loopwright.report.compare import FIGURES, render_comparison
from loopwright.report.export import export_run
from loopwright.store import load_run

POINT_COLUMNS = [
    "index", "timestamp_utc", "step", "frequency_hz", "amplitude_vpp", "gain_db", "phase_deg",
    "gain_re", "gain_im", "gain_db_std", "phase_deg_std", "reference_amplitude_v",
    "response_amplitude_v", "reference_snr_db", "response_snr_db", "reference_thd_pct",
    "response_thd_pct", "reference_scale_v_per_div", "response_scale_v_per_div",
    "sample_rate_hz", "record_length", "averages", "refined", "flags",
]


# --- invented loops (demo scenarios of our own) ------------------------------------


def third_order_amplifier(gain: float = 4.0, corner_hz: float = 20e3):
    """Negative-feedback loop L = gain / (1 + s/wc)^3, measured as H = -L.

    At gain 4 it is the table's 4/(s+1)^3 time-scaled: GM 2 (6.0206 dB) at
    sqrt(3)*fc, PM 27.1416 deg at 1.232819*fc (references.md, python-control 0.10.2).
    """
    wc = 2 * np.pi * corner_hz
    return signal.ZerosPolesGain([], [-wc] * 3, -gain * wc**3)


def tank_oscillator(excess: float = 1.3, centre_hz: float = 150e3, q: float = 8.0):
    """Amplifier (excess gain) driving an LC tank with a pole at 10x the centre: H > 0
    near the tank's centre, so the Barkhausen criterion is met just below it."""
    w0 = 2 * np.pi * centre_hz
    tank = signal.TransferFunction([excess * w0 / q, 0.0], [1.0, w0 / q, w0**2])
    pole = 10 * w0
    num = np.polymul(tank.num, [pole])
    den = np.polymul(tank.den, [1.0, pole])
    return signal.TransferFunction(num, den)


def exact_h(system, frequency_hz: np.ndarray) -> np.ndarray:
    _, h = signal.freqresp(system, 2 * np.pi * frequency_hz)
    return h


# --- a run folder as the runner writes it --------------------------------------------


def write_run(
    folder: Path,
    system,
    *,
    start_hz: float,
    stop_hz: float,
    serial: str,
    limits: list[dict],
    per_decade: int = 24,
    flags: dict[int, str] | None = None,
    closed_loop: bool = False,
    calibration: bool = False,
    operator: str = "A. Tester",
    procedure_name: str = "invented_loop",
) -> Path:
    """Write manifest.json, points.csv, summary.json (and extras) for ``system``."""
    folder.mkdir(parents=True)
    decades = math.log10(stop_hz / start_hz)
    frequency_hz = np.logspace(math.log10(start_hz), math.log10(stop_hz),
                               round(decades * per_decade) + 1)
    h = exact_h(system, frequency_hz)
    gain_db = 20 * np.log10(np.abs(h))
    phase_deg = np.degrees(np.angle(h))
    # Invented uncertainty: grows where the loop gain is small (poor response SNR).
    gain_db_std = 0.03 + 0.02 * np.clip(-gain_db, 0, None)
    phase_deg_std = np.degrees(gain_db_std / 8.686)
    flags = flags or {}
    with (folder / "points.csv").open("w", newline="") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(POINT_COLUMNS)
        for i, f in enumerate(frequency_hz):
            writer.writerow([
                i, f"2026-03-0{1 + i % 5}T20:{i % 60:02d}:00Z", 0, repr(float(f)), 0.2,
                repr(float(gain_db[i])), repr(float(phase_deg[i])), repr(float(h[i].real)),
                repr(float(h[i].imag)), repr(float(gain_db_std[i])),
                repr(float(phase_deg_std[i])), 0.1, 0.1 * abs(h[i]), 60.0, 55.0, 0.01, 0.2,
                0.05, 0.05, 1e7, 10000, 1, 0, flags.get(i, ""),
            ])
    response = FrequencyResponse(frequency_hz, h, gain_db_std, phase_deg_std)
    analysis = analyze_loop(response).to_dict()
    summary = {
        "analysis": analysis,
        "limits": [],
        "verdict": "none",
        "closed_loop": None,
        "points": int(frequency_hz.size),
        "flagged_points": len(flags),
    }
    if closed_loop:
        predicted = analysis["oscillation_frequency_hz"]
        running_hz = predicted * 1.004
        sample_rate_hz = 64 * running_hz
        t = np.arange(8192) / sample_rate_hz
        a1, a2, a3 = 1.5, 0.015, 0.03
        v = (a1 * np.sin(2 * np.pi * running_hz * t) + a2 * np.sin(4 * np.pi * running_hz * t)
             + a3 * np.sin(6 * np.pi * running_hz * t))
        np.savez(folder / "closed_loop.npz", time_s=t, response_v=v)
        summary["closed_loop"] = {
            "frequency_hz": running_hz, "amplitude_v": a1,
            "thd_pct": 100 * math.hypot(a2, a3) / a1,
            "predicted_frequency_hz": predicted,
            "frequency_error_pct": 100 * (running_hz - predicted) / predicted,
        }
    # The project's own limit evaluation (procedure.schema), as the runner does it.
    summary["limits"], summary["verdict"] = evaluate_limits(
        [Limit(**limit) for limit in limits], analysis, summary["closed_loop"])
    if calibration:
        cal_f = np.logspace(math.log10(start_hz), math.log10(stop_hz), 12)
        mismatch = (1 + 0.004 * np.log10(cal_f / start_hz)) * np.exp(
            -1j * 2 * np.pi * cal_f * 0.4e-9)
        pd.DataFrame({
            "frequency_hz": cal_f, "mismatch_db": 20 * np.log10(np.abs(mismatch)),
            "mismatch_deg": np.degrees(np.angle(mismatch)), "mismatch_re": mismatch.real,
            "mismatch_im": mismatch.imag,
        }).to_csv(folder / "calibration.csv", index=False)
    manifest = {
        "format": "loopwright-run/1", "software_version": "0.1.0", "host": "bench-pc-7",
        "operator": operator, "serial": serial, "station": "line 2 <east>",
        "procedure": {"name": procedure_name, "sign": 1,
                      "steps": [{"sweep": {"start_hz": start_hz, "stop_hz": stop_hz}}]},
        "procedure_file": "procedures/invented.yaml", "procedure_sha256": "ab" * 32,
        "bench": {"generator": {"resource": "TCPIP::127.0.0.1::5025::SOCKET"}},
        "instruments": {
            "generator": {"resource": "TCPIP::127.0.0.1::5025::SOCKET",
                          "idn": "Invented Gen Co,G-1,SN<9>&1,1.0", "driver": "scpi-basic"},
            "scope": {"resource": "TCPIP::127.0.0.1::5026::SOCKET",
                      "idn": "Invented Scope Co,S-2,77,2.1", "driver": "scpi-basic"},
        },
        "started_utc": "2026-03-01T20:00:00Z", "ended_utc": "2026-03-01T20:41:00Z",
        "status": "complete", "reason": None, "replay_of": None, "reanalysis_of": None,
        "calibration": None,
    }
    (folder / "manifest.json").write_text(json.dumps(manifest, indent=2))
    (folder / "summary.json").write_text(json.dumps(summary, indent=2))
    (folder / "traffic.log").write_text("")
    return folder


AMPLIFIER_LIMITS = [
    {"name": "phase margin", "figure": "phase_margin_deg", "min": 45.0},
    {"name": "gain margin", "figure": "gain_margin_db", "min": 6.0},
    {"name": "crossover", "figure": "crossover_frequency_hz", "min": 20e3, "max": 30e3},
]
OSCILLATOR_LIMITS = [
    {"name": "start-up excess gain", "figure": "excess_gain", "min": 1.15},
    {"name": "oscillation frequency", "figure": "oscillation_frequency_hz", "min": 140e3,
     "max": 160e3},
    {"name": "running frequency", "figure": "closed_loop_frequency_hz", "min": 148e3,
     "max": 151e3},
]


@pytest.fixture(scope="module")
def amplifier_run(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("runs") / "20260301T200000Z_amp_SN-A1"
    return write_run(folder, third_order_amplifier(), start_hz=1e3, stop_hz=200e3,
                     serial='SN<A1>&"x"', limits=AMPLIFIER_LIMITS,
                     operator="<script>alert(1)</script>",
                     procedure_name="amp --><script>alert(2)</script>",
                     flags={3: "low_snr", 20: "clipped;nonlinear", 41: "unsettled"},
                     calibration=True)


@pytest.fixture(scope="module")
def oscillator_run(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("runs") / "20260301T210000Z_osc_SN-O7"
    return write_run(folder, tank_oscillator(), start_hz=30e3, stop_hz=800e3,
                     serial="SN-O7", limits=OSCILLATOR_LIMITS, closed_loop=True,
                     flags={5: "low_snr"}, procedure_name="tank_oscillator")


@pytest.fixture(scope="module")
def amplifier_report(amplifier_run):
    return render_report(amplifier_run)


@pytest.fixture(scope="module")
def oscillator_report(oscillator_run):
    return render_report(oscillator_run)


# --- the HTML ---------------------------------------------------------------------------


def parse_strict(text: str):
    """html5lib's HTML5 parser in strict mode raises on any parse error."""
    return html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(text)


def outside_references(text: str) -> list[str]:
    """Every reference that could leave the document: anything in src/href/url() that
    is not a fragment naming an id of this document, and any script element."""
    ids = set(re.findall(r'\bid="([^"]+)"', text))
    found = []
    for attr, target in re.findall(r'\b((?:xlink:)?href|src|srcset|action|data)\s*=\s*"([^"]*)"',
                                   text):
        if not (target.startswith("#") and target[1:] in ids):
            found.append(f"{attr}={target}")
    for target in re.findall(r"url\(\s*['\"]?([^)'\"]*)", text):
        if not (target.startswith("#") and target[1:] in ids):
            found.append(f"url({target})")
    found += re.findall(r"<script\b|@import|<link\b|<iframe\b|<img\b|<object\b|<embed\b",
                        text, flags=re.I)
    return found


@pytest.mark.parametrize("which", ["amplifier", "oscillator"])
def test_html_parses_strictly_and_is_self_contained(which, amplifier_report,
                                                     oscillator_report):
    files = amplifier_report if which == "amplifier" else oscillator_report
    text = files.html.read_text(encoding="utf-8")
    parse_strict(text)  # raises html5lib.html5parser.ParseError on any error
    assert outside_references(text) == []
    assert "<svg" in text and "@page" in text


def test_outside_reference_check_can_fail():
    # The detector itself must see the things it forbids.
    bad = ('<p id="a"></p><img src="http://x/y.png"><a href="#a"></a>'
           '<div style="background:url(https://x/f.png)"></div><script></script>'
           '<svg><use xlink:href="#nowhere"/></svg>')
    found = outside_references(bad)
    assert any("http://x/y.png" in f for f in found)
    assert any("https://x/f.png" in f for f in found)
    assert any("nowhere" in f for f in found)
    assert any(f.lower().startswith("<script") for f in found)
    assert not any(f.endswith("=#a") for f in found)


def test_html_holds_the_summary_figures(amplifier_run, amplifier_report):
    text = amplifier_report.html.read_text(encoding="utf-8")
    analysis = json.loads((amplifier_run / "summary.json").read_text())["analysis"]
    # Shown with 2 decimals in the tables and the plot.
    assert f"{analysis['phase_margin_deg']:.2f}" in text
    assert f"{analysis['gain_margin_db']:.2f}" in text
    crossover = analysis["gain_crossovers"][0]["frequency_hz"]
    assert f"{crossover / 1e3:.4f} kHz" in text  # 6 significant digits
    assert "FAIL" in text  # phase margin 27 deg < 45 deg
    assert "1 of 3 limit(s) not met" in text


def test_html_escapes_user_strings(amplifier_report):
    text = amplifier_report.html.read_text(encoding="utf-8")
    assert "<script" not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "SN&lt;A1&gt;&amp;&quot;x&quot;" in text
    assert "SN&lt;9&gt;&amp;1" in text  # an *IDN? reply
    assert "<!--" not in text  # nothing from a file can close a comment early


def test_html_holds_closed_loop_calibration_provenance_points(
        oscillator_run, oscillator_report, amplifier_report):
    text = oscillator_report.html.read_text(encoding="utf-8")
    summary = json.loads((oscillator_run / "summary.json").read_text())
    assert "Closed-loop check" in text
    assert f"{summary['closed_loop']['thd_pct']:.3f} %" in text
    assert f"{summary['closed_loop']['frequency_error_pct']:.3f} %" in text
    assert "Invented Scope Co,S-2,77,2.1" in text and "scpi-basic" in text
    assert "ab" * 32 in text
    assert "Channel calibration" not in text
    amp = amplifier_report.html.read_text(encoding="utf-8")
    assert "Channel calibration" in amp and "Closed-loop check" not in amp
    # One table row per point, flagged rows named.
    points = pd.read_csv(oscillator_run / "points.csv")
    section = text[text.index('id="points"'):]
    assert section.count("<tr") == len(points) + 1
    assert section.count('class="flagged"') == 1 and "low SNR" in section


# --- the PNG ----------------------------------------------------------------------------


def panel_ink(image: np.ndarray, rows: slice) -> float:
    """Share of pixels in the band of rows that are not near-white."""
    rgb = image[rows, :, :3]
    return float(np.mean(np.any(rgb < 0.85, axis=2)))


@pytest.mark.parametrize("which", ["amplifier", "oscillator"])
def test_png_size_and_both_panels_drawn(which, amplifier_report, oscillator_report):
    files = amplifier_report if which == "amplifier" else oscillator_report
    image = mpimg.imread(files.png)
    height, width = image.shape[:2]
    assert (width, height) == (1100, 770)  # 10 x 7 in at 110 dpi
    # Gain panel in the upper half, phase panel in the lower half.
    top, bottom = slice(int(0.1 * height), int(0.45 * height)), slice(int(0.5 * height),
                                                                      int(0.85 * height))
    assert panel_ink(image, top) > 0.02
    assert panel_ink(image, bottom) > 0.02
    # The gain trace's colour is present in the upper panel, the phase trace's in the lower.
    assert _has_colour(image[top], palette.GAIN_COLOUR)
    assert _has_colour(image[bottom], palette.PHASE_COLOUR)
    assert files.svg.is_file() and files.svg.stat().st_size > 10_000


def _has_colour(image: np.ndarray, hex_colour: str, tolerance: float = 0.06) -> bool:
    target = np.array([int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)])
    distance = np.abs(image[..., :3] - target).max(axis=-1)
    return int(np.sum(distance < tolerance)) > 200


@pytest.mark.parametrize(("value", "shown"), [
    (12_345.0, "12.35 kHz"), (999.4, "999.4 Hz"), (999.96, "1.000 kHz"),
    (-0.00099996, "-1.000 mHz"), (0.5, "500.0 mHz"), (0.0, "0 Hz"), (float("nan"), "–"),
])
def test_engineering_shows_four_significant_digits(value, shown):
    # SI prefixes (BIPM SI Brochure, 9th ed., table 7 (mem)); 4 significant digits
    # counted after rounding, so a value that rounds up to the next prefix keeps 4
    from loopwright.report.formatting import engineering

    assert engineering(value, "Hz") == shown


def test_palette_traces_differ_in_lightness_and_avoid_channel_colours():
    # CIE L* (CIE 15:2004 from IEC 61966-2-1 sRGB): black is 0, white 100.
    assert palette.lightness("#000000") == pytest.approx(0.0, abs=1e-9)
    assert palette.lightness("#FFFFFF") == pytest.approx(100.0, abs=1e-6)
    assert palette.lightness("#777777") == pytest.approx(50.0, abs=0.5)  # (mem) mid grey
    assert abs(palette.lightness(palette.GAIN_COLOUR)
               - palette.lightness(palette.PHASE_COLOUR)) > 30
    for colour in (palette.GAIN_COLOUR, palette.PHASE_COLOUR):
        assert colour not in (palette.YELLOW, palette.SKY_BLUE, palette.REDDISH_PURPLE,
                              palette.BLUE)
    markers = [s["marker"] for s in palette.FLAG_STYLES.values()]
    colours = [s["colour"] for s in palette.FLAG_STYLES.values()]
    assert len(set(markers)) == len(markers) and len(set(colours)) == len(colours)
    assert len(set(palette.run_styles(28))) == 28


# --- python-control -----------------------------------------------------------------


def test_frd_margins_agree_with_summary(amplifier_run):
    # Source: python-control stability_margins (references.md, "Stability margins";
    # 4/(s+1)^3: GM 2 at sqrt(3), PM 27.1416 deg at 1.232819).
    import control  # test dependency: missing fails, never skips
    summary = json.loads((amplifier_run / "summary.json").read_text())["analysis"]
    frd = load_run(amplifier_run).to_frd()
    gm, pm, _, wg, wp, _ = control.stability_margins(frd)
    assert pm == pytest.approx(summary["phase_margin_deg"], abs=0.05)
    assert 20 * np.log10(gm) == pytest.approx(summary["gain_margin_db"], abs=0.02)
    assert wp / (2 * np.pi) == pytest.approx(summary["phase_margin_frequency_hz"], rel=2e-3)
    assert wg / (2 * np.pi) == pytest.approx(summary["gain_margin_frequency_hz"], rel=2e-3)
    # And both agree with the published values of the time-scaled table entry.
    assert pm == pytest.approx(27.1416, abs=0.05)
    assert wp / (2 * np.pi) == pytest.approx(1.232819 * 20e3, rel=2e-3)
    assert 20 * np.log10(gm) == pytest.approx(20 * np.log10(2), abs=0.02)


# --- export ------------------------------------------------------------------------------


def test_export_csv_reads_back_with_pandas(amplifier_run, tmp_path):
    out = export_run(amplifier_run, "csv", tmp_path / "points.csv")
    text = out.read_text(encoding="utf-8")
    header = text.splitlines()[0].split(",")
    assert header[:3] == ["index", "timestamp_utc", "step"]
    assert "frequency_hz" in header and "gain_re_v_per_v" in header
    assert not text.startswith(",")  # no index column
    back = pd.read_csv(out)
    original = pd.read_csv(amplifier_run / "points.csv")
    for name, column in (("frequency_hz", "frequency_hz"), ("gain_db", "gain_db"),
                         ("phase_deg", "phase_deg"), ("gain_re", "gain_re_v_per_v"),
                         ("gain_db_std", "gain_db_std")):
        np.testing.assert_array_equal(back[column].to_numpy(), original[name].to_numpy())
    assert back.loc[20, "flags"] == "clipped nonlinear"
    assert ";" not in text


def test_export_json_holds_everything(amplifier_run, tmp_path):
    out = export_run(amplifier_run, "json", tmp_path / "run.json")
    data = json.loads(out.read_text())
    summary = json.loads((amplifier_run / "summary.json").read_text())
    assert data["format"] == "loopwright-export/1"
    assert data["summary"] == summary
    assert len(data["points"]) == summary["points"]
    assert data["points"][0]["frequency_hz"] == pytest.approx(1e3)
    assert len(data["calibration"]) == 12


def test_export_cli_to_stdout_and_file(amplifier_run, tmp_path, capsys):
    assert main(["export", str(amplifier_run), "--format", "csv"]) == 0
    text = capsys.readouterr().out
    assert text == (export_run(amplifier_run, "csv", tmp_path / "a.csv")
                    .read_text(encoding="utf-8"))
    out = tmp_path / "b.json"
    assert main(["export", str(amplifier_run), "--format", "json", "--out", str(out)]) == 0
    assert json.loads(out.read_text())["run"] == amplifier_run.name
    assert main(["export", str(amplifier_run), "--format", "json", "--out",
                 str(tmp_path / "no" / "such" / "x.json")]) == 2


# --- compare -----------------------------------------------------------------------------


@pytest.fixture(scope="module")
def three_boards(tmp_path_factory) -> list[Path]:
    base = tmp_path_factory.mktemp("boards")
    return [
        write_run(base / f"2026030{i}T200000Z_amp_B{i}", third_order_amplifier(gain, corner),
                  start_hz=1e3, stop_hz=200e3, serial=f"B{i}", limits=AMPLIFIER_LIMITS,
                  per_decade=12)
        for i, (gain, corner) in enumerate([(4.0, 20e3), (3.6, 21e3), (4.4, 19e3)], start=1)
    ]


def test_compare_spread_equals_numpy(three_boards, tmp_path):
    files = render_comparison(three_boards, tmp_path / "cmp.html")
    text = files.html.read_text(encoding="utf-8")
    parse_strict(text)
    assert outside_references(text) == []
    summaries = [json.loads((d / "summary.json").read_text())["analysis"] for d in three_boards]
    from loopwright.report.compare import figure_values, spread

    for key in ("phase_margin_deg", "gain_margin_db", "phase_margin_frequency_hz"):
        values = np.array([s[key] for s in summaries])
        result = spread(figure_values([{"analysis": s} for s in summaries], key))
        assert result.count == 3
        assert result.mean == pytest.approx(np.mean(values), rel=1e-12)
        assert result.std == pytest.approx(np.std(values, ddof=1), rel=1e-12)
        assert (result.min, result.max) == (np.min(values), np.max(values))
    pm = np.array([s["phase_margin_deg"] for s in summaries])
    assert f"{np.mean(pm):.3f}" in text and f"{np.std(pm, ddof=1):.3f}" in text
    image = mpimg.imread(files.png)
    assert image.shape[:2] == (770, 1100)
    assert {"B1", "B2", "B3"} <= set(re.findall(r">(B\d)<", text))
    assert len(FIGURES) >= 5


def test_compare_cli_with_progress_and_bad_out(three_boards, tmp_path, capsys):
    out = tmp_path / "c.html"
    assert main(["compare", *map(str, three_boards), "--out", str(out)]) == 0
    assert out.is_file() and out.with_suffix(".png").is_file()
    assert main(["compare", str(three_boards[0]), "--out", str(tmp_path / "c.txt")]) == 2
    assert "must end in .html" in capsys.readouterr().err


def test_compare_progress_bar_counts_every_run(three_boards, tmp_path):
    import io

    from rich.console import Console

    buffer = io.StringIO()
    console = Console(file=buffer, force_terminal=True, width=100)
    render_comparison(three_boards, tmp_path / "p.html", progress=True, console=console)
    drawn = buffer.getvalue()
    assert "reading runs" in drawn and "drawing runs" in drawn
    assert "3/3" in drawn


# --- CLI and bad input ------------------------------------------------------------------


def test_report_cli_rerenders_from_folder_alone(oscillator_run, tmp_path, capsys):
    copy = tmp_path / oscillator_run.name
    shutil.copytree(oscillator_run, copy)
    for name in ("report.html", "bode.png", "bode.svg"):
        (copy / name).unlink(missing_ok=True)
    assert main(["report", str(copy)]) == 0
    assert {"report.html", "bode.png", "bode.svg"} <= {p.name for p in copy.iterdir()}
    assert "report.html" in capsys.readouterr().out


def test_report_of_a_run_without_summary(amplifier_run, tmp_path):
    # An aborted run may end before summary.json: the report still shows its points.
    run = tmp_path / "aborted"
    shutil.copytree(amplifier_run, run)
    (run / "summary.json").unlink()
    files = render_report(run)
    text = files.html.read_text(encoding="utf-8")
    parse_strict(text)
    assert "NO LIMITS CHECKED" in text and "No analysis in summary.json" in text
    assert text.count('class="flagged"') == 3


def test_unwritable_report_file_is_one_line(amplifier_run, tmp_path, capsys):
    # A folder where bode.png should go: the write fails even for root.
    run = tmp_path / "blocked"
    shutil.copytree(amplifier_run, run)
    (run / "bode.png").unlink(missing_ok=True)
    (run / "bode.png").mkdir()
    assert main(["report", str(run)]) == 2
    err = capsys.readouterr().err.strip()
    assert "cannot write the report" in err and "bode.png" in err
    assert len(err.splitlines()) == 1


@pytest.mark.parametrize("breakage, expected", [
    ("not_a_folder", "not a folder"),
    ("no_manifest", "no manifest.json"),
    ("no_points", "holds no points"),
    ("bad_json", "summary.json:3: not valid JSON"),
    ("missing_column", "points.csv:1: the header is not"),
    ("analysis_text", "summary.json: analysis: expected an object"),
    ("crossing_number", "summary.json: analysis.gain_crossovers[0]: expected an object"),
    ("limits_object", "summary.json: limits: expected a list"),
    ("closed_loop_number", "summary.json: closed_loop: expected an object"),
    ("instruments_list", "manifest.json: instruments: expected an object"),
])
def test_bad_run_folder_is_one_line_exit_2(breakage, expected, amplifier_run, tmp_path,
                                           capsys):
    run = tmp_path / "run"
    shutil.copytree(amplifier_run, run)
    if breakage == "not_a_folder":
        run = tmp_path / "nothing_here"
    elif breakage == "no_manifest":
        (run / "manifest.json").unlink()
    elif breakage == "no_points":
        (run / "points.csv").unlink()
    elif breakage == "bad_json":
        (run / "summary.json").write_text('{\n  "verdict": "pass",\n  oops\n}')
    elif breakage == "missing_column":
        table = pd.read_csv(run / "points.csv").drop(columns=["phase_deg"])
        table.to_csv(run / "points.csv", index=False)
    elif breakage in ("analysis_text", "crossing_number", "limits_object",
                      "closed_loop_number", "instruments_list"):
        # hand-edited JSON of the right syntax but the wrong shape
        name = "manifest.json" if breakage == "instruments_list" else "summary.json"
        document = json.loads((run / name).read_text())
        if breakage == "analysis_text":
            document["analysis"] = "fine"
        elif breakage == "crossing_number":
            document["analysis"]["gain_crossovers"] = [1.0e4]
        elif breakage == "limits_object":
            document["limits"] = {"pm": 45}
        elif breakage == "closed_loop_number":
            document["closed_loop"] = 5
        else:
            document["instruments"] = ["generator"]
        (run / name).write_text(json.dumps(document))
    for command in (["report", str(run)], ["export", str(run), "--format", "csv"],
                    ["compare", str(amplifier_run), str(run), "--out",
                     str(tmp_path / "c.html")]):
        assert main(command) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and expected in err and "Traceback" not in err


# --- a real browser ----------------------------------------------------------------------


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


def _headless(tmp_path: Path, *options: str, page: Path) -> subprocess.CompletedProcess:
    browser = _chromium()
    if browser is None:
        if os.environ.get("CI") == "true":
            pytest.fail("chromium is missing in CI (.ci/run installs Debian's chromium)")
        pytest.skip("chromium is not installed here (apt-get install chromium); "
                    "CI installs it and runs this test")
    command = [
        browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
        "--no-first-run", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", *options,
        page.resolve().as_uri(),
    ]
    return subprocess.run(command, capture_output=True, text=True, timeout=90,
                          stdin=subprocess.DEVNULL, check=False)


@pytest.mark.browser
def test_chromium_renders_the_report(oscillator_report, tmp_path):
    shot = tmp_path / "shot.png"
    result = _headless(tmp_path, f"--screenshot={shot}", "--window-size=1200,1600",
                       page=oscillator_report.html)
    assert shot.is_file(), f"no screenshot; chromium said: {result.stderr[-2000:]}"
    image = mpimg.imread(shot)
    assert image.shape[:2] == (1600, 1200)
    ink = np.any(image[..., :3] < 0.85, axis=2)
    assert ink.mean() > 0.02, "the page rendered blank"
    # The Bode figure sits below the header and verdict: rows 300..1100 hold its axes,
    # traces and labels; the trace colours must be drawn there.
    plot = image[300:1100, 60:1140]
    assert np.any(plot[..., :3] < 0.85, axis=2).mean() > 0.03
    assert _has_colour(plot, palette.PHASE_COLOUR, tolerance=0.1)


@pytest.mark.browser
def test_chromium_prints_the_report_on_several_pages(amplifier_report, tmp_path):
    pdf = tmp_path / "report.pdf"
    result = _headless(tmp_path, f"--print-to-pdf={pdf}", "--no-pdf-header-footer",
                       page=amplifier_report.html)
    assert pdf.is_file(), f"no PDF; chromium said: {result.stderr[-2000:]}"
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF")
    pages = len(re.findall(rb"/Type\s*/Page(?!s)", data))
    # Header, verdict and Bode plot; provenance and the points table start new pages.
    assert pages >= 3
