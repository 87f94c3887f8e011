"""Population statistics of limited figures: mean, spread and process capability.

For each figure (grouped with its limits, since a Cpk only means something against
one pair of limits) over the runs of a results index: count, mean, sample standard
deviation (ddof=1), min, max and Cpk. The numbers are pure functions
(:func:`figure_stats`); :func:`render_histogram` draws a terminal histogram with
unicode blocks and :func:`write_histogram_png` a PNG (matplotlib, Agg).

Capability indices (Montgomery, Introduction to Statistical Quality Control, the
chapter on process capability (mem))::

    Cpu = (USL - mean) / (3 s)        Cpl = (mean - LSL) / (3 s)
    Cpk = min(Cpu, Cpl)               one-sided: Cpk = Cpu or Cpl alone
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from loopwright.errors import InputError
from loopwright.production.index import ResultsIndex

#: Bins of the terminal histogram.
TERMINAL_BINS = 12
#: Width of the longest terminal bar, in characters.
BAR_WIDTH_CHARS = 40
_EIGHTHS = " ▏▎▍▌▋▊▉█"


@dataclass(frozen=True)
class FigureStats:
    """Statistics of one figure against one pair of limits.

    ``std`` is the sample standard deviation (ddof=1); it, ``cpk``, ``cpu`` and
    ``cpl`` are None where they are undefined (fewer than two values, zero spread,
    or no limit on that side).
    """

    figure: str
    unit: str | None
    limit_min: float | None
    limit_max: float | None
    count: int
    missing: int
    failed: int
    mean: float | None
    std: float | None
    min: float | None
    max: float | None
    cpu: float | None
    cpl: float | None
    cpk: float | None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def capability(
    mean: float, std: float, lsl: float | None, usl: float | None
) -> tuple[float | None, float | None, float | None]:
    """Cpu, Cpl and Cpk of a process (Montgomery (mem)).

    Parameters
    ----------
    mean, std
        Process mean and standard deviation.
    lsl, usl
        Lower and upper specification limits; None where there is none.

    Returns
    -------
    (cpu, cpl, cpk)
        Each None where undefined: no limit on that side, or ``std`` not positive.
        ``cpk`` is the smaller of the defined sides (one-sided when only one limit).
    """
    if not (std > 0 and math.isfinite(std)):
        return None, None, None
    cpu = None if usl is None else (usl - mean) / (3.0 * std)
    cpl = None if lsl is None else (mean - lsl) / (3.0 * std)
    sides = [c for c in (cpu, cpl) if c is not None]
    return cpu, cpl, (min(sides) if sides else None)


def figure_stats(
    figure: str,
    values: Sequence[float | None] | np.ndarray,
    *,
    limit_min: float | None,
    limit_max: float | None,
    unit: str | None = None,
    failed: int = 0,
) -> FigureStats:
    """Statistics of one figure's values (None/NaN values are counted as missing)."""
    arr = np.array([np.nan if v is None else float(v) for v in values], dtype=float)
    good = arr[np.isfinite(arr)]
    count = int(good.size)
    if count == 0:
        return FigureStats(
            figure, unit, limit_min, limit_max, 0, int(arr.size), failed,
            None, None, None, None, None, None, None,
        )
    mean = float(np.mean(good))
    std = float(np.std(good, ddof=1)) if count >= 2 else None
    cpu = cpl = cpk = None
    if std is not None:
        cpu, cpl, cpk = capability(mean, std, limit_min, limit_max)
    return FigureStats(
        figure=figure,
        unit=unit,
        limit_min=limit_min,
        limit_max=limit_max,
        count=count,
        missing=int(arr.size - count),
        failed=failed,
        mean=mean,
        std=std,
        min=float(np.min(good)),
        max=float(np.max(good)),
        cpu=cpu,
        cpl=cpl,
        cpk=cpk,
    )


def load_figure_table(
    index: ResultsIndex, *, since: datetime | None = None, figure: str | None = None
) -> pd.DataFrame:
    """Every limited figure of every run in the index as a DataFrame (one row each)."""
    rows = index.figure_rows(since=since, figure=figure)
    columns = [
        "run_id", "serial", "station", "started_utc", "status", "verdict", "retest",
        "limit_name", "figure", "value", "limit_min", "limit_max", "unit", "passed",
    ]
    frame = pd.DataFrame(rows, columns=columns)
    return frame


def _group_key(value: Any) -> float | None:
    return None if value is None or (isinstance(value, float) and math.isnan(value)) else value


def population_stats(frame: pd.DataFrame) -> list[FigureStats]:
    """Group a figure table by (figure, limit_min, limit_max) and compute each group.

    A run counts once per group even if two of its limits name the same figure.
    """
    result: list[FigureStats] = []
    if frame.empty:
        return result
    keyed = frame.assign(
        _lo=[_group_key(v) for v in frame["limit_min"]],
        _hi=[_group_key(v) for v in frame["limit_max"]],
    )
    groups: dict[tuple[str, float | None, float | None], pd.DataFrame] = {}
    for (fig, lo, hi), part in keyed.groupby(["figure", "_lo", "_hi"], dropna=False, sort=True):
        groups[(fig, _group_key(lo), _group_key(hi))] = part
    for (fig, lo, hi), part in groups.items():
        once = part.drop_duplicates(subset="run_id")
        units = [u for u in once["unit"] if isinstance(u, str)]
        failed = int((once["passed"] == False).sum())  # noqa: E712 (None stays None)
        result.append(
            figure_stats(
                fig,
                once["value"].tolist(),
                limit_min=lo,
                limit_max=hi,
                unit=units[0] if units else None,
                failed=failed,
            )
        )
    return result


def histogram_edges(values: np.ndarray, stats: FigureStats, bins: int) -> np.ndarray:
    """Bin edges spanning the values and the limits, so both show on one axis."""
    ends = [float(np.min(values)), float(np.max(values))]
    ends += [v for v in (stats.limit_min, stats.limit_max) if v is not None]
    low, high = min(ends), max(ends)
    if high == low:
        low, high = low - 0.5, high + 0.5
    pad = 0.02 * (high - low)
    return np.linspace(low - pad, high + pad, bins + 1)


def render_histogram(
    values: Sequence[float] | np.ndarray,
    stats: FigureStats,
    *,
    bins: int = TERMINAL_BINS,
    width_chars: int = BAR_WIDTH_CHARS,
) -> list[str]:
    """A text histogram, one line per bin: ``[low, high)  count  bar``.

    Bars are drawn in eighths of a character (unicode blocks). A bin lying wholly
    outside the limits is marked ``out``; the bins holding the limits say ``LSL``/``USL``.
    Returned as rich markup lines (the out-of-limit bars are red).
    """
    arr = np.asarray(values, dtype=float)
    arr = arr[np.isfinite(arr)]
    if arr.size == 0:
        return ["(no values)"]
    edges = histogram_edges(arr, stats, bins)
    counts, _ = np.histogram(arr, bins=edges)
    peak = max(int(counts.max()), 1)
    lines = []
    for k, count in enumerate(counts):
        low, high = edges[k], edges[k + 1]
        eighths = int(np.rint(count / peak * width_chars * 8))
        bar = "█" * (eighths // 8) + (_EIGHTHS[eighths % 8] if eighths % 8 else "")
        outside = (stats.limit_min is not None and high <= stats.limit_min) or (
            stats.limit_max is not None and low >= stats.limit_max
        )
        marks = []
        if stats.limit_min is not None and low <= stats.limit_min < high:
            marks.append("LSL")
        if stats.limit_max is not None and low <= stats.limit_max < high:
            marks.append("USL")
        if outside:
            marks.append("out")
        style = "red" if outside else "green"
        label = f"{low:>11.4g} … {high:<11.4g}"
        lines.append(
            f"{label} {int(count):>4} [{style}]{bar:<{width_chars}}[/{style}] {' '.join(marks)}"
        )
    return lines


def write_histogram_png(
    path: str | Path,
    groups: Sequence[tuple[FigureStats, np.ndarray]],
    *,
    title: str | None = None,
) -> Path:
    """One histogram per figure, limits and mean marked, written as a PNG.

    Raises
    ------
    InputError
        If the file cannot be written.
    """
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    out = Path(path)
    n = max(len(groups), 1)
    fig = Figure(figsize=(7.0, 2.6 * n), layout="constrained")
    axes = fig.subplots(n, 1, squeeze=False)[:, 0]
    if not groups:
        axes[0].text(0.5, 0.5, "no values", ha="center", va="center")
    for ax, (stats, values) in zip(axes, groups, strict=False):
        arr = np.asarray(values, dtype=float)
        arr = arr[np.isfinite(arr)]
        if arr.size:
            edges = histogram_edges(arr, stats, max(8, min(40, arr.size)))
            ax.hist(arr, bins=edges, color="#4a7ab5", edgecolor="white")
            ax.axvline(float(np.mean(arr)), color="black", linestyle=":", label="mean")
        for limit, name in ((stats.limit_min, "LSL"), (stats.limit_max, "USL")):
            if limit is not None:
                ax.axvline(limit, color="#c0392b", linewidth=1.5, label=name)
        unit = f" ({stats.unit})" if stats.unit else ""
        cpk = "n/a" if stats.cpk is None else f"{stats.cpk:.2f}"
        ax.set_title(f"{stats.figure}{unit}: n={stats.count}, Cpk={cpk}", fontsize=10)
        ax.set_ylabel("runs")
        ax.legend(fontsize=8, loc="upper right")
    if title:
        fig.suptitle(title, fontsize=11)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        fig.savefig(out, dpi=110, format="png")  # the name as given, no ".png" added
    except OSError as exc:
        raise InputError(f"cannot write the histogram: {exc}", path=out) from exc
    return out


def group_values(frame: pd.DataFrame, stats: FigureStats) -> np.ndarray:
    """The values behind one :class:`FigureStats` (one per run)."""
    if frame.empty:
        return np.array([], dtype=float)
    lo = frame["limit_min"].map(_group_key)
    hi = frame["limit_max"].map(_group_key)
    mask = (
        (frame["figure"] == stats.figure)
        & (lo.isna() if stats.limit_min is None else lo == stats.limit_min)
        & (hi.isna() if stats.limit_max is None else hi == stats.limit_max)
    )
    part = frame[mask].drop_duplicates(subset="run_id")
    return part["value"].astype(float).to_numpy()
