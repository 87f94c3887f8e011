"""Bode plots of a run: gain and phase of H over log frequency, annotated.

The figures are built on :class:`matplotlib.figure.Figure` with the Agg canvas (no
pyplot state, no display needed). One run's plot shows the measured points, a ±2σ band
from the per-point uncertainty, flagged points with their own marker shapes and
colours, the 0 dB and 0° lines, every gain crossover with its phase margin, every 0°
crossing with its gain margin (or, where the Barkhausen criterion is met, the predicted
oscillation frequency and the excess gain), and hatched masks where a limit forbids
the trace. The overlay plot draws several runs on one pair of axes.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import EngFormatter, FuncFormatter, MultipleLocator, NullFormatter
from matplotlib.transforms import offset_copy

from loopwright.report import palette
from loopwright.report.formatting import engineering, is_number

#: Half width of a limit mask (a "gate") around a crossing: this share of the
#: frequency axis's width in decades, but at least MASK_MIN_HALF_WIDTH_DECADES.
MASK_HALF_WIDTH_SHARE = 0.02
MASK_MIN_HALF_WIDTH_DECADES = 0.005
#: Half height of a frequency limit's band around 0 dB or 0 deg.
FREQUENCY_MASK_HALF_DB = 3.0
FREQUENCY_MASK_HALF_DEG = 20.0
#: Uncertainty bands are drawn at ± this many standard deviations.
BAND_SIGMAS = 2.0

_RC = {
    "font.size": 9,
    "axes.titlesize": 10,
    "axes.labelsize": 9,
    "legend.fontsize": 8,
    "svg.hashsalt": "loopwright",  # stable element ids: the same run gives the same SVG
    "svg.fonttype": "path",  # glyphs as paths: the SVG needs no font from anywhere
}


def _split_flags(value: object) -> list[str]:
    if not isinstance(value, str) or not value.strip():
        return []
    return [part.strip() for part in value.split(";") if part.strip()]


def wrap_breaks(frequency_hz: np.ndarray, phase_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Copies of the arrays with NaN inserted where the wrapped phase jumps by > 180°.

    A line through a wrapped phase would otherwise draw a vertical stroke across the
    whole panel at each wrap.
    """
    frequency_hz = np.asarray(frequency_hz, dtype=float)
    phase_deg = np.asarray(phase_deg, dtype=float)
    if phase_deg.size < 2:
        return frequency_hz.copy(), phase_deg.copy()
    jumps = np.flatnonzero(np.abs(np.diff(phase_deg)) > 180.0) + 1
    return (
        np.insert(frequency_hz, jumps, np.nan),
        np.insert(phase_deg, jumps, np.nan),
    )


def _minor_labeller(mantissas: tuple[float, ...]) -> FuncFormatter:
    """A formatter that labels only the minor ticks at the given mantissas."""

    def label(value: float, _pos: int) -> str:
        mantissa = value / 10.0 ** math.floor(math.log10(value) + 1e-9)
        if any(abs(mantissa - m) < 1e-6 for m in mantissas):
            return _ENG(value)
        return ""

    return FuncFormatter(label)


_ENG = EngFormatter(unit="Hz", places=0)


def _label_minor_ticks(*axes) -> None:
    """Under two decades the major ticks are too few: label the 2x and 5x minor ticks,
    and under 0.8 decade the 2x..9x ones (8x and 9x skipped, they crowd the next 1x)."""
    low, high = axes[0].get_xlim()
    if low <= 0:
        return
    span = math.log10(high / low)
    if span < 0.8:
        mantissas = (2.0, 3.0, 4.0, 5.0, 6.0, 7.0)
    elif span < 2.0:
        mantissas = (2.0, 5.0)
    else:
        return
    for ax in axes:
        ax.xaxis.set_minor_formatter(_minor_labeller(mantissas))


def _frequency_axis(ax) -> None:
    ax.set_xscale("log")
    ax.xaxis.set_major_formatter(EngFormatter(unit="Hz", places=0))
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.grid(True, which="major", color="#BBBBBB", linewidth=0.6)
    ax.grid(True, which="minor", color="#E5E5E5", linewidth=0.4)


def _new_bode_axes(title: str | None) -> tuple[Figure, object, object]:
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(10.0, 7.0), dpi=110, layout="constrained")
        FigureCanvasAgg(fig)
        ax_gain, ax_phase = fig.subplots(2, 1, sharex=True, height_ratios=(1.0, 1.0))
    for ax in (ax_gain, ax_phase):
        _frequency_axis(ax)
    ax_gain.axhline(0.0, color=palette.GUIDE_COLOUR, linewidth=1.0, zorder=1)
    ax_phase.axhline(0.0, color=palette.GUIDE_COLOUR, linewidth=1.0, zorder=1)
    ax_gain.set_ylabel("loop gain |H| (dB)")
    ax_phase.set_ylabel("loop phase ∠H (deg)")
    ax_phase.set_xlabel("frequency (Hz, log scale)")
    ax_phase.set_ylim(-180.0, 180.0)
    ax_phase.yaxis.set_major_locator(MultipleLocator(45.0))
    if title:
        fig.suptitle(title, fontsize=11)
    return fig, ax_gain, ax_phase


def _gain_limits(gain_db: np.ndarray, std_db: np.ndarray | None) -> tuple[float, float]:
    finite = gain_db[np.isfinite(gain_db)]
    if finite.size == 0:
        return -20.0, 20.0
    low, high = float(finite.min()), float(finite.max())
    if std_db is not None:
        spread = np.nan_to_num(std_db, nan=0.0) * BAND_SIGMAS
        low = min(low, float(np.nanmin(gain_db - spread)))
        high = max(high, float(np.nanmax(gain_db + spread)))
    low, high = min(low, 0.0), max(high, 0.0)
    pad = max(3.0, 0.12 * (high - low))
    return math.floor((low - pad) / 5.0) * 5.0, math.ceil((high + pad) / 5.0) * 5.0


def _column(points: pd.DataFrame, name: str) -> np.ndarray | None:
    if name not in points.columns:
        return None
    values = pd.to_numeric(points[name], errors="coerce").to_numpy(dtype=float)
    return values if np.isfinite(values).any() else None


def _mask_span(frequency_hz: float, axis_decades: float) -> tuple[float, float]:
    half = max(MASK_MIN_HALF_WIDTH_DECADES, MASK_HALF_WIDTH_SHARE * axis_decades)
    factor = 10.0**half
    return frequency_hz / factor, frequency_hz * factor


def _shade(ax, x0: float, x1: float, y0: float, y1: float) -> None:
    if not (y1 > y0 and x1 > x0):
        return
    ax.fill_between(
        [x0, x1],
        [y0, y0],
        [y1, y1],
        facecolor=palette.MASK_FILL,
        edgecolor=palette.MASK_EDGE,
        hatch=palette.MASK_HATCH,
        linewidth=0.6,
        alpha=0.85,
        zorder=0.5,
    )


def draw_limit_masks(
    ax_gain, ax_phase, analysis: Mapping | None, limits: Iterable[Mapping]
) -> bool:
    """Shade the regions the limits forbid; returns True when anything was shaded.

    - ``phase_margin_deg``: near each gain crossover, the phase band below ``min``
      (and above ``max``), since the phase margin is ∠H at |H| = 1.
    - ``gain_margin_db``: near each 0° crossing, the gain band above ``-min`` dB
      (and below ``-max`` dB), since the gain margin is -|H| in dB there.
    - ``excess_gain`` / ``loop_gain``: near each 0° crossing, the gain below
      20·log10(min) (and above 20·log10(max)).
    - ``resonance_peak_db``: near each resonance, the gain above ``max`` (below ``min``).
    - ``closed_loop_*``: nothing here (the closed-loop figure shows them).
    - a frequency of a 0° crossing (``oscillation_frequency_hz``,
      ``gain_margin_frequency_hz``): a band around 0° outside [min, max]; of a gain
      crossover: a band around 0 dB; any other figure in Hz: full height.
    """
    analysis = analysis or {}
    crossovers = [c["frequency_hz"] for c in analysis.get("gain_crossovers") or []
                  if is_number(c.get("frequency_hz"))]
    zero_phase = [z["frequency_hz"] for z in analysis.get("zero_phase_crossings") or []
                  if is_number(z.get("frequency_hz"))]
    resonances = [r["frequency_hz"] for r in analysis.get("resonances") or []
                  if is_number(r.get("frequency_hz"))]
    g_low, g_high = ax_gain.get_ylim()
    x_low, x_high = ax_gain.get_xlim()
    decades = math.log10(x_high / x_low) if x_low > 0 and x_high > x_low else 1.0
    shaded = False
    for limit in limits:
        figure = str(limit.get("figure") or limit.get("name") or "")
        lo, hi = limit.get("min"), limit.get("max")
        lo = float(lo) if is_number(lo) else None
        hi = float(hi) if is_number(hi) else None
        if figure == "phase_margin_deg":
            for f in crossovers:
                x0, x1 = _mask_span(f, decades)
                if lo is not None:
                    _shade(ax_phase, x0, x1, -180.0, lo)
                if hi is not None:
                    _shade(ax_phase, x0, x1, hi, 180.0)
                shaded = shaded or bool(crossovers)
        elif figure == "gain_margin_db":
            for f in zero_phase:
                x0, x1 = _mask_span(f, decades)
                if lo is not None:
                    _shade(ax_gain, x0, x1, -lo, g_high)
                if hi is not None:
                    _shade(ax_gain, x0, x1, g_low, -hi)
                shaded = shaded or bool(zero_phase)
        elif figure in ("excess_gain", "loop_gain"):
            for f in zero_phase:
                x0, x1 = _mask_span(f, decades)
                if lo is not None and lo > 0:
                    _shade(ax_gain, x0, x1, g_low, 20.0 * math.log10(lo))
                if hi is not None and hi > 0:
                    _shade(ax_gain, x0, x1, 20.0 * math.log10(hi), g_high)
                shaded = shaded or bool(zero_phase)
        elif figure == "resonance_peak_db":
            for f in resonances:
                x0, x1 = _mask_span(f, decades)
                if hi is not None:
                    _shade(ax_gain, x0, x1, hi, g_high)
                if lo is not None:
                    _shade(ax_gain, x0, x1, g_low, lo)
                shaded = True
        elif figure.startswith("closed_loop_"):
            continue  # shown on the closed-loop figure, not on the open-loop sweep
        elif figure.endswith("_hz"):
            # Where the figure is a 0 deg crossing, the phase trace must cross 0 deg
            # inside [min, max]: shade a band around 0 deg outside it. Where it is a
            # gain crossover, the same around 0 dB; otherwise full height.
            if "oscillation" in figure or figure.startswith("gain_margin"):
                bands = [(ax_phase, -FREQUENCY_MASK_HALF_DEG, FREQUENCY_MASK_HALF_DEG)]
            elif "crossover" in figure or figure.startswith("phase_margin"):
                bands = [(ax_gain, -FREQUENCY_MASK_HALF_DB, FREQUENCY_MASK_HALF_DB)]
            else:
                bands = [(ax_gain, g_low, g_high), (ax_phase, -180.0, 180.0)]
            for ax, y0, y1 in bands:
                if lo is not None and lo > x_low:
                    _shade(ax, x_low, lo, y0, y1)
                    shaded = True
                if hi is not None and hi < x_high:
                    _shade(ax, hi, x_high, y0, y1)
                    shaded = True
    ax_gain.set_ylim(g_low, g_high)
    ax_gain.set_xlim(x_low, x_high)
    return shaded


def _dense_trace(frequency_hz: np.ndarray, values: np.ndarray) -> np.ndarray:
    """(x, y) samples along a trace, 8 per segment in log f, for collision tests."""
    ok = np.isfinite(frequency_hz) & np.isfinite(values) & (frequency_hz > 0)
    f, v = frequency_hz[ok], values[ok]
    if f.size < 2:
        return np.column_stack([f, v])
    x = np.log10(f)
    fine = np.linspace(0.0, x.size - 1.0, (x.size - 1) * 8 + 1)
    return np.column_stack([10.0 ** np.interp(fine, np.arange(x.size), x),
                            np.interp(fine, np.arange(x.size), v)])


class _Placer:
    """Places annotation boxes clear of each other, of the traces, and inside the axes."""

    # Offsets in points from the anchor, tried in order (nearest first).
    CANDIDATES = (
        *((dx * k, dy * k) for k in (1, 2, 3, 4)
          for dx, dy in ((14, 18), (14, -30), (-14, 18), (-14, -30))),
        (60, 0), (-60, 0), (120, 30), (-120, 30), (120, -40), (-120, -40),
    )

    def __init__(self, fig: Figure, traces: Mapping[object, Sequence[np.ndarray]]) -> None:
        self.fig = fig
        self.traces = traces
        self.placed: list = []

    def _hits_trace(self, ax, box) -> bool:
        padded = box.padded(3.0)
        for trace in self.traces.get(ax, ()):
            if trace.size == 0:
                continue
            xy = ax.transData.transform(trace)
            inside = ((xy[:, 0] >= padded.x0) & (xy[:, 0] <= padded.x1)
                      & (xy[:, 1] >= padded.y0) & (xy[:, 1] <= padded.y1))
            if inside.any():
                return True
        return False

    def _make(self, ax, x: float, y: float, text: str, colour: str, dx: float, dy: float):
        return ax.annotate(
            text,
            xy=(x, y),
            xytext=(dx, dy),
            textcoords="offset points",
            ha="left" if dx > 0 else "right" if dx < 0 else "center",
            va="bottom" if dy > 0 else "top" if dy < 0 else "center",
            fontsize=8,
            color="#000000",
            bbox={"boxstyle": "round,pad=0.3", "fc": "white", "ec": colour, "lw": 0.8},
            arrowprops={"arrowstyle": "-", "color": colour, "lw": 0.8},
            zorder=6,
        )

    def annotate(self, ax, x: float, y: float, text: str, colour: str) -> None:
        renderer = self.fig.canvas.get_renderer()
        axes_box = ax.get_window_extent(renderer)
        fallback = None
        for dx, dy in self.CANDIDATES:
            ann = self._make(ax, x, y, text, colour, dx, dy)
            box = ann.get_window_extent(renderer)
            inside = (box.x0 >= axes_box.x0 and box.x1 <= axes_box.x1
                      and box.y0 >= axes_box.y0 and box.y1 <= axes_box.y1)
            clear = not any(box.overlaps(other) for other in self.placed)
            if inside and clear and not self._hits_trace(ax, box):
                self.placed.append(box)
                return
            if fallback is None and inside and clear:
                fallback = (dx, dy)
            ann.remove()
        dx, dy = fallback or self.CANDIDATES[0]
        ann = self._make(ax, x, y, text, colour, dx, dy)
        self.placed.append(ann.get_window_extent(renderer))


def _annotate_figures(fig: Figure, ax_gain, ax_phase, analysis: Mapping | None,
                      traces: Mapping[object, Sequence[np.ndarray]]) -> None:
    if not analysis:
        return
    placer = _Placer(fig, traces)
    fig.canvas.draw()  # lays out the constrained axes before boxes are measured
    x_low, x_high = ax_gain.get_xlim()
    for crossing in analysis.get("gain_crossovers") or []:
        f, pm = crossing.get("frequency_hz"), crossing.get("phase_margin_deg")
        if not (is_number(f) and x_low <= f <= x_high):
            continue
        for ax in (ax_gain, ax_phase):
            ax.axvline(f, color=palette.GUIDE_COLOUR, linestyle=(0, (2, 2)), linewidth=0.8,
                       zorder=1)
        ax_gain.plot([f], [0.0], marker="o", ms=6, mfc="white",
                     mec=palette.GAIN_COLOUR, zorder=5)
        if is_number(pm):
            ax_phase.annotate("", xy=(f, pm), xytext=(f, 0.0),
                              arrowprops={"arrowstyle": "<->", "color": palette.PHASE_COLOUR,
                                          "lw": 1.2}, zorder=5)
            ax_phase.plot([f], [pm], marker="o", ms=6, mfc="white",
                          mec=palette.PHASE_COLOUR, zorder=5)
            placer.annotate(ax_phase, f, pm,
                            f"phase margin {pm:.1f}°\nat {engineering(f, 'Hz')}",
                            palette.PHASE_COLOUR)
    for crossing in analysis.get("zero_phase_crossings") or []:
        f = crossing.get("frequency_hz")
        if not (is_number(f) and x_low <= f <= x_high):
            continue
        loop_gain = crossing.get("loop_gain")
        gain_db = 20.0 * math.log10(loop_gain) if is_number(loop_gain) and loop_gain > 0 else None
        for ax in (ax_gain, ax_phase):
            ax.axvline(f, color=palette.GUIDE_COLOUR, linestyle=(0, (6, 3)), linewidth=0.8,
                       zorder=1)
        ax_phase.plot([f], [0.0], marker="s", ms=5, mfc="white",
                      mec=palette.PHASE_COLOUR, zorder=5)
        if gain_db is None:
            continue
        ax_gain.annotate("", xy=(f, gain_db), xytext=(f, 0.0),
                         arrowprops={"arrowstyle": "<->", "color": palette.GAIN_COLOUR,
                                     "lw": 1.2}, zorder=5)
        ax_gain.plot([f], [gain_db], marker="s", ms=5, mfc="white",
                     mec=palette.GAIN_COLOUR, zorder=5)
        if crossing.get("barkhausen_met"):
            excess = crossing.get("excess_gain")
            excess = excess if is_number(excess) else loop_gain
            text = (f"oscillation predicted at {engineering(f, 'Hz')}\n"
                    f"excess gain {excess:.3f} (+{20.0 * math.log10(excess):.2f} dB)")
        else:
            gm = crossing.get("gain_margin_db")
            gm = gm if is_number(gm) else -gain_db
            text = f"gain margin {gm:.2f} dB\nat {engineering(f, 'Hz')}"
        placer.annotate(ax_gain, f, gain_db, text, palette.GAIN_COLOUR)


def bode_figure(
    points: pd.DataFrame,
    analysis: Mapping | None = None,
    limits: Sequence[Mapping] = (),
    title: str | None = None,
) -> Figure:
    """The annotated Bode plot of one run.

    Parameters
    ----------
    points
        Rows of points.csv (needs ``frequency_hz``, ``gain_db``, ``phase_deg``; uses
        ``gain_db_std``, ``phase_deg_std`` and ``flags`` when present).
    analysis
        ``summary.json["analysis"]`` (LoopFigures.to_dict()), or None.
    limits
        ``summary.json["limits"]``.
    title
        Figure title.
    """
    points = points.sort_values("frequency_hz")
    frequency_hz = points["frequency_hz"].to_numpy(dtype=float)
    gain_db = points["gain_db"].to_numpy(dtype=float)
    phase_deg = points["phase_deg"].to_numpy(dtype=float)
    gain_std = _column(points, "gain_db_std")
    phase_std = _column(points, "phase_deg_std")
    fig, ax_gain, ax_phase = _new_bode_axes(title)
    handles: list = []

    if gain_std is not None:
        spread = BAND_SIGMAS * np.nan_to_num(gain_std, nan=0.0)
        ax_gain.fill_between(frequency_hz, gain_db - spread, gain_db + spread,
                             color=palette.GAIN_COLOUR, alpha=0.18, linewidth=0, zorder=2)
    if phase_std is not None:
        spread = BAND_SIGMAS * np.nan_to_num(phase_std, nan=0.0)
        # break the band where the centre line wraps, so both edges break together
        jumps = np.flatnonzero(np.abs(np.diff(phase_deg)) > 180.0) + 1
        band_f = np.insert(frequency_hz, jumps, np.nan)
        low_p = np.insert(phase_deg - spread, jumps, np.nan)
        high_p = np.insert(phase_deg + spread, jumps, np.nan)
        ax_phase.fill_between(band_f, low_p, high_p, color=palette.PHASE_COLOUR, alpha=0.22,
                              linewidth=0, zorder=2)
    ax_gain.plot(frequency_hz, gain_db, color=palette.GAIN_COLOUR, linewidth=1.5,
                 marker="o", ms=2.5, zorder=3)
    ax_phase.plot(*wrap_breaks(frequency_hz, phase_deg), color=palette.PHASE_COLOUR,
                  linewidth=1.5, linestyle="--", marker="o", ms=2.5, zorder=3)
    handles.append(Line2D([], [], color=palette.GAIN_COLOUR, lw=1.5, marker="o", ms=2.5,
                          label="gain (measured points)"))
    handles.append(Line2D([], [], color=palette.PHASE_COLOUR, lw=1.5, ls="--", marker="o",
                          ms=2.5, label="phase (measured points)"))
    if gain_std is not None or phase_std is not None:
        handles.append(Patch(facecolor="#9A9A9A", alpha=0.45,
                             label=f"±{BAND_SIGMAS:g}σ per-point uncertainty"))

    flags = points["flags"].map(_split_flags) if "flags" in points.columns else None
    if flags is not None:
        for name, style in palette.FLAG_STYLES.items():
            # A point with several flags shows each marker, stacked upwards, so
            # none hides another.
            rank = flags.map(lambda fl, name=name: fl.index(name) if name in fl else -1)
            rank = rank.to_numpy(dtype=int)
            if not (rank >= 0).any():
                continue
            kwargs = {"marker": style["marker"], "s": 36, "facecolor": style["colour"],
                      "edgecolor": "black", "linewidths": 0.6, "zorder": 4}
            for level in np.unique(rank[rank >= 0]):
                chosen = rank == level
                for ax, values in ((ax_gain, gain_db), (ax_phase, phase_deg)):
                    shift = offset_copy(ax.transData, fig=fig, y=9.0 * level, units="points")
                    ax.scatter(frequency_hz[chosen], values[chosen], transform=shift,
                               **kwargs)
            handles.append(Line2D([], [], linestyle="none", marker=style["marker"], ms=7,
                                  mfc=style["colour"], mec="black", mew=0.6,
                                  label=f"{style['label']} ({int((rank >= 0).sum())})"))

    finite_f = frequency_hz[np.isfinite(frequency_hz) & (frequency_hz > 0)]
    if finite_f.size:
        ax_gain.set_xlim(finite_f.min() / 1.15, finite_f.max() * 1.15)
        _label_minor_ticks(ax_gain, ax_phase)
    ax_gain.set_ylim(*_gain_limits(gain_db, gain_std))
    if draw_limit_masks(ax_gain, ax_phase, analysis, limits):
        handles.append(Patch(facecolor=palette.MASK_FILL, edgecolor=palette.MASK_EDGE,
                             hatch=palette.MASK_HATCH, label="outside a limit"))
    traces = {ax_gain: [_dense_trace(frequency_hz, gain_db)],
              ax_phase: [_dense_trace(*wrap_breaks(frequency_hz, phase_deg))]}
    _annotate_figures(fig, ax_gain, ax_phase, analysis, traces)
    fig.legend(handles=handles, loc="outside lower center", ncol=min(len(handles), 4),
               frameon=False)
    return fig


def overlay_figure(
    runs: Sequence[tuple[str, pd.DataFrame, Mapping | None]],
    title: str | None = None,
    on_run: Callable[[str], None] | None = None,
) -> Figure:
    """Several runs on one Bode plot, each with its own colour and line style.

    Each run's gain crossovers are marked with a circle (at 0 dB and at its phase
    margin) and its 0° crossings with a square, in the run's colour.

    Parameters
    ----------
    runs
        (label, points, analysis) per run; analysis is ``summary.json["analysis"]``
        or None.
    title
        Figure title.
    on_run
        Called with each run's label after it is drawn (progress reporting).
    """
    fig, ax_gain, ax_phase = _new_bode_axes(title)
    handles = []
    low_f, high_f, gains = np.inf, 0.0, []
    for (label, points, analysis), (colour, style) in zip(
            runs, palette.run_styles(len(runs)), strict=False):
        points = points.sort_values("frequency_hz")
        f = points["frequency_hz"].to_numpy(dtype=float)
        g = points["gain_db"].to_numpy(dtype=float)
        p = points["phase_deg"].to_numpy(dtype=float)
        ax_gain.plot(f, g, color=colour, linestyle=style, linewidth=1.4, zorder=3)
        ax_phase.plot(*wrap_breaks(f, p), color=colour, linestyle=style, linewidth=1.4,
                      zorder=3)
        marker = {"mfc": "white", "mec": colour, "mew": 1.3, "zorder": 5, "ls": "none"}
        for crossing in (analysis or {}).get("gain_crossovers") or []:
            f_c, pm = crossing.get("frequency_hz"), crossing.get("phase_margin_deg")
            if is_number(f_c):
                ax_gain.plot([f_c], [0.0], marker="o", ms=6, **marker)
                if is_number(pm):
                    ax_phase.plot([f_c], [pm], marker="o", ms=6, **marker)
        for crossing in (analysis or {}).get("zero_phase_crossings") or []:
            f_z, loop_gain = crossing.get("frequency_hz"), crossing.get("loop_gain")
            if is_number(f_z):
                ax_phase.plot([f_z], [0.0], marker="s", ms=5, **marker)
                if is_number(loop_gain) and loop_gain > 0:
                    ax_gain.plot([f_z], [20.0 * math.log10(loop_gain)], marker="s", ms=5,
                                 **marker)
        handles.append(Line2D([], [], color=colour, linestyle=style, lw=1.6, label=label))
        positive = f[np.isfinite(f) & (f > 0)]
        if positive.size:
            low_f, high_f = min(low_f, positive.min()), max(high_f, positive.max())
        gains.append(g)
        if on_run is not None:
            on_run(label)
    if high_f > 0:
        ax_gain.set_xlim(low_f / 1.15, high_f * 1.15)
        _label_minor_ticks(ax_gain, ax_phase)
    if gains:
        ax_gain.set_ylim(*_gain_limits(np.concatenate(gains), None))
    fig.legend(handles=handles, loc="outside lower center", ncol=min(len(handles), 6),
               frameon=False)
    return fig


def save_png(fig: Figure, path: Path) -> Path:
    """Write ``fig`` as PNG (white background) and return the path."""
    fig.savefig(path, format="png", dpi=110, facecolor="white")
    return path


def svg_document(fig: Figure) -> str:
    """``fig`` as a standalone SVG document (glyphs as paths, stable ids, no date)."""
    buffer = io.StringIO()
    with matplotlib.rc_context(_RC):
        fig.savefig(buffer, format="svg", facecolor="white", metadata={"Date": None})
    return buffer.getvalue()


def inline_svg(document: str, id_prefix: str) -> str:
    """An SVG document as an ``<svg>`` element for inlining into HTML.

    The XML prolog, DOCTYPE, metadata block (it names outside vocabularies) and
    comments are dropped, and every element id gets ``id_prefix`` so several figures can share
    one HTML document without their ids colliding.
    """
    text = document[document.index("<svg"):]
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.S)
    # Comments repeat the plot's text (serials, names): drop them, the glyphs stay.
    text = re.sub(r"<!--.*?-->", "", text, flags=re.S)
    ids = set(re.findall(r'\bid="([^"]+)"', text))
    if ids:
        text = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{id_prefix}{m.group(1)}"', text)
        text = re.sub(r"url\(#([^)]+)\)",
                      lambda m: f"url(#{id_prefix}{m.group(1)})" if m.group(1) in ids
                      else m.group(0), text)
        text = re.sub(r'href="#([^"]+)"',
                      lambda m: f'href="#{id_prefix}{m.group(1)}"' if m.group(1) in ids
                      else m.group(0), text)
    # Scale with the page: drop the fixed size, keep the viewBox.
    text = re.sub(r'(<svg\b[^>]*?)\s+width="[^"]*"\s+height="[^"]*"', r"\1", text, count=1)
    return text


def svg_text(fig: Figure, id_prefix: str) -> str:
    """``fig`` as an inline ``<svg>`` element; see :func:`inline_svg`."""
    return inline_svg(svg_document(fig), id_prefix)
