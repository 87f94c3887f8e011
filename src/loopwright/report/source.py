"""What a report needs from a run folder: the run itself plus its optional extras.

The run (manifest, summary, points, calibration) comes from the store's ``load_run``;
this module adds the one file only the report reads, ``closed_loop.npz``, checked
with an error that names the file and the field.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from loopwright.errors import InputError
from loopwright.store import load_run

CLOSED_LOOP_ARRAYS = ("time_s", "response_v")


@dataclass(frozen=True)
class ReportInput:
    """Everything one run's report is drawn from.

    Attributes
    ----------
    path
        The run folder.
    manifest, summary
        The parsed ``manifest.json`` and ``summary.json`` (summary may be empty when the
        run ended before writing it).
    points
        ``points.csv`` as a DataFrame, sorted by frequency.
    calibration
        ``calibration.csv`` as a DataFrame, or None.
    closed_loop_time_s, closed_loop_response_v
        The free-running waveform of ``closed_loop.npz``, or None.
    """

    path: Path
    manifest: dict[str, Any]
    summary: dict[str, Any]
    points: pd.DataFrame
    calibration: pd.DataFrame | None
    closed_loop_time_s: np.ndarray | None
    closed_loop_response_v: np.ndarray | None


def calibration_table(frequency_hz: np.ndarray, mismatch: np.ndarray) -> pd.DataFrame:
    """The channel mismatch as a table with gain (dB) and phase (deg) columns."""
    mismatch = np.asarray(mismatch, dtype=complex)
    return pd.DataFrame({
        "frequency_hz": np.asarray(frequency_hz, dtype=float),
        "mismatch_db": 20.0 * np.log10(np.abs(mismatch)),
        "mismatch_deg": np.degrees(np.angle(mismatch)),
    })


def read_closed_loop(path: Path) -> tuple[np.ndarray, np.ndarray] | tuple[None, None]:
    """(time_s, response_v) of ``closed_loop.npz``, or (None, None) when absent."""
    if not path.is_file():
        return None, None
    try:
        with np.load(path, allow_pickle=False) as data:
            missing = [name for name in CLOSED_LOOP_ARRAYS if name not in data.files]
            if missing:
                raise InputError("missing array", path=path, field=missing[0])
            time_s = np.asarray(data["time_s"], dtype=float)
            response_v = np.asarray(data["response_v"], dtype=float)
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot read the closed-loop record: {exc}", path=path) from exc
    if time_s.ndim != 1 or time_s.shape != response_v.shape or time_s.size < 8:
        raise InputError(
            f"time_s and response_v must be 1-D of equal length >= 8, got "
            f"{time_s.shape} and {response_v.shape}", path=path, field="response_v")
    if not (np.isfinite(time_s).all() and np.isfinite(response_v).all()):
        raise InputError("holds NaN or infinite values", path=path, field="response_v")
    return time_s, response_v


def _expect(value: Any, kind: type, path: Path, field: str) -> None:
    """``value`` is None or a ``kind``; otherwise InputError naming file and field."""
    if value is not None and not isinstance(value, kind):
        raise InputError(f"expected {'an object' if kind is dict else 'a list'}, got "
                         f"{type(value).__name__}", path=path, field=field)


def _expect_objects(value: Any, path: Path, field: str) -> None:
    """``value`` is None or a list of objects (JSON dicts)."""
    _expect(value, list, path, field)
    for i, item in enumerate(value or []):
        _expect(item, dict, path, f"{field}[{i}]")
        if item is None:
            raise InputError("expected an object, got null", path=path, field=f"{field}[{i}]")


def check_shapes(summary: dict[str, Any], manifest: dict[str, Any], folder: Path) -> None:
    """Refuse a hand-edited summary.json or manifest.json whose parts the report walks
    (analysis, its crossing and resonance lists, limits, closed_loop, instruments)
    have the wrong JSON type, with an :class:`InputError` naming the file and field.
    Values themselves may be anything: the report shows what is not a number as text."""
    where = folder / "summary.json"
    analysis = summary.get("analysis")
    _expect(analysis, dict, where, "analysis")
    for key in ("gain_crossovers", "zero_phase_crossings", "resonances"):
        _expect_objects((analysis or {}).get(key), where, f"analysis.{key}")
    _expect_objects(summary.get("limits"), where, "limits")
    _expect(summary.get("closed_loop"), dict, where, "closed_loop")
    instruments = manifest.get("instruments")
    _expect(instruments, dict, folder / "manifest.json", "instruments")
    for role, info in (instruments or {}).items():
        _expect(info, dict, folder / "manifest.json", f"instruments.{role}")


def report_input(run_dir: str | Path) -> ReportInput:
    """Read everything the report of ``run_dir`` shows.

    Raises
    ------
    InputError
        The folder is not a run folder, or one of its files is unreadable or malformed.
    """
    run = load_run(run_dir)
    path = Path(run.path)
    if run.points.empty:
        raise InputError("the run holds no points (points.csv is missing or empty)",
                         path=path / "points.csv")
    check_shapes(run.summary or {}, run.manifest or {}, path)
    points = run.points.sort_values("frequency_hz", kind="stable").reset_index(drop=True)
    calibration = run.calibration
    time_s, response_v = read_closed_loop(path / "closed_loop.npz")
    return ReportInput(
        path=path,
        manifest=dict(run.manifest or {}),
        summary=dict(run.summary or {}),
        points=points,
        calibration=None if calibration is None else calibration_table(*calibration),
        closed_loop_time_s=time_s,
        closed_loop_response_v=response_v,
    )
