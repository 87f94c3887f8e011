"""The report's smaller figures: closed-loop waveform and spectrum, channel calibration."""

from __future__ import annotations

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import EngFormatter, MaxNLocator

from loopwright.report import palette
from loopwright.report.bode import _RC, _frequency_axis
from loopwright.report.formatting import engineering, is_number

#: Cycles of the free-running waveform shown in the time plot.
CYCLES_SHOWN = 4
#: Harmonics shown in the spectrum plot.
HARMONICS_SHOWN = 6
#: Half width of the zoom around the fundamental, as a fraction of it (at least).
ZOOM_HALF_WIDTH = 0.02


def spectrum_dbc(
    time_s: np.ndarray, response_v: np.ndarray, zero_pad: int = 1
) -> tuple[np.ndarray, np.ndarray]:
    """Hann-windowed amplitude spectrum in dB relative to its largest line.

    Returns (frequency_hz, level_dbc); the DC bin is dropped. ``zero_pad`` > 1 pads
    the record to that many times its length, which draws the window's main lobe
    smoothly (display only: it adds no resolution). The window's scalloping (up to
    1.42 dB, Harris 1978) only affects the display, never a reported figure.
    """
    sample_interval_s = float(np.median(np.diff(time_s)))
    centred = response_v - np.mean(response_v)
    window = np.hanning(centred.size)
    length = centred.size * max(1, int(zero_pad))
    magnitude = np.abs(np.fft.rfft(centred * window, n=length))
    frequency_hz = np.fft.rfftfreq(length, sample_interval_s)
    peak = magnitude[1:].max() if magnitude.size > 1 else 0.0
    floor = np.finfo(float).tiny
    level = 20.0 * np.log10(np.maximum(magnitude, floor) / max(peak, floor))
    return frequency_hz[1:], level[1:]


def closed_loop_figure(
    time_s: np.ndarray,
    response_v: np.ndarray,
    closed_loop: dict | None,
    limits: list[dict] | tuple = (),
) -> Figure:
    """Waveform (a few cycles) and spectrum of the free-running loop.

    The measured frequency (solid) and the open-loop prediction (dashed) are marked on
    the zoom; a ``closed_loop_frequency_hz`` limit hatches the frequencies outside it.
    """
    closed_loop = closed_loop or {}
    freq_hz, level_dbc = spectrum_dbc(time_s, response_v)
    measured_hz = closed_loop.get("frequency_hz")
    if not is_number(measured_hz) or measured_hz <= 0:
        measured_hz = float(freq_hz[np.argmax(level_dbc)])
    predicted_hz = closed_loop.get("predicted_frequency_hz")

    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(10.0, 3.4), dpi=110, layout="constrained")
        FigureCanvasAgg(fig)
        ax_time, ax_spec, ax_zoom = fig.subplots(1, 3, width_ratios=(1.0, 1.0, 0.8))

    shown_s = CYCLES_SHOWN / measured_hz
    start_s = time_s[0]
    chosen = time_s <= start_s + shown_s
    if chosen.sum() < 8:
        chosen = np.ones_like(time_s, dtype=bool)
    ax_time.plot(time_s[chosen] - start_s, response_v[chosen], color=palette.GAIN_COLOUR,
                 linewidth=1.3)
    ax_time.xaxis.set_major_formatter(EngFormatter(unit="s"))
    ax_time.yaxis.set_major_formatter(EngFormatter(unit="V"))
    ax_time.set_xlabel("time since record start (s)")
    ax_time.set_ylabel("response (V)")
    ax_time.set_title(f"waveform, first {CYCLES_SHOWN} cycles")
    ax_time.grid(True, color="#DDDDDD", linewidth=0.5)

    top_hz = min(freq_hz[-1], measured_hz * (HARMONICS_SHOWN + 0.5))
    keep = freq_hz <= top_hz
    floor_db = max(-120.0, float(np.min(level_dbc[keep])) - 5.0)
    ax_spec.plot(freq_hz[keep] / measured_hz, level_dbc[keep], color=palette.GAIN_COLOUR,
                 linewidth=1.0)
    ax_spec.set_ylim(floor_db, 5.0)
    ax_spec.set_xlim(0.0, top_hz / measured_hz)
    ax_spec.set_xticks(np.arange(0, HARMONICS_SHOWN + 1))
    ax_spec.set_xlabel("frequency / measured fundamental (harmonic number)")
    ax_spec.set_ylabel("level (dB re fundamental)")
    ax_spec.set_title("spectrum, Hann window")
    ax_spec.grid(True, color="#DDDDDD", linewidth=0.5)

    # Zoom on the fundamental: measured line against the open-loop prediction.
    fine_hz, fine_db = spectrum_dbc(time_s, response_v, zero_pad=16)
    half = ZOOM_HALF_WIDTH * measured_hz
    if is_number(predicted_hz):
        half = max(half, 2.0 * abs(predicted_hz - measured_hz))
    near = np.abs(fine_hz - measured_hz) <= half
    ax_zoom.plot(fine_hz[near], fine_db[near], color=palette.GAIN_COLOUR, linewidth=1.2)
    ax_zoom.axvline(measured_hz, color=palette.PHASE_COLOUR, linewidth=1.4,
                    label=f"measured {engineering(measured_hz, 'Hz', 6)}")
    if is_number(predicted_hz):
        ax_zoom.axvline(predicted_hz, color=palette.BLUE, linewidth=1.4, linestyle="--",
                        label=f"open loop {engineering(predicted_hz, 'Hz', 6)}")
    for limit in limits:
        if limit.get("figure") != "closed_loop_frequency_hz":
            continue
        for bound, side in ((limit.get("min"), -1), (limit.get("max"), 1)):
            if is_number(bound):
                edge = measured_hz + side * 10 * half
                ax_zoom.axvspan(min(bound, edge), max(bound, edge), facecolor=palette.MASK_FILL,
                                edgecolor=palette.MASK_EDGE, hatch=palette.MASK_HATCH,
                                alpha=0.85, zorder=0.5, label=None)
    ax_zoom.set_xlim(measured_hz - half, measured_hz + half)
    ax_zoom.set_ylim(-60.0, 5.0)
    ax_zoom.xaxis.set_major_formatter(EngFormatter(unit="Hz", places=1))
    ax_zoom.xaxis.set_major_locator(MaxNLocator(3))
    ax_zoom.set_xlabel("frequency (Hz)")
    ax_zoom.set_title("zoom on the fundamental")
    ax_zoom.grid(True, color="#DDDDDD", linewidth=0.5)
    ax_zoom.legend(loc="lower center", frameon=True, framealpha=0.95, fontsize=7)
    return fig


def calibration_figure(calibration: pd.DataFrame) -> Figure:
    """Channel mismatch (channel 2 / channel 1, both probes on one node) over frequency."""
    frequency_hz = calibration["frequency_hz"].to_numpy(dtype=float)
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(10.0, 3.0), dpi=110, layout="constrained")
        FigureCanvasAgg(fig)
        ax_db, ax_deg = fig.subplots(1, 2)
    for ax, column, colour, label in (
        (ax_db, "mismatch_db", palette.GAIN_COLOUR, "gain mismatch (dB)"),
        (ax_deg, "mismatch_deg", palette.PHASE_COLOUR, "phase mismatch (deg)"),
    ):
        _frequency_axis(ax)
        ax.plot(frequency_hz, calibration[column].to_numpy(dtype=float), color=colour,
                marker="o", ms=2.5, linewidth=1.3)
        ax.axhline(0.0, color=palette.GUIDE_COLOUR, linewidth=0.8)
        ax.set_xlabel("frequency (Hz, log scale)")
        ax.set_ylabel(label)
    return fig
