"""Reanalysis: every point of a stored run recomputed from its raw captures.

Each ``captures/point_NNNNN.npz`` (written when a sweep has ``keep_captures: true``)
goes through the runner's own per-point code, :class:`PointMeasurer` (estimator,
quality flags, unsettled check, channel-mismatch correction), fed by
:class:`StoredCaptures`, a scope that hands back the stored record. The stored sign is
applied and the row written as the runner writes it, into a new run folder whose
manifest says ``reanalysis_of`` (the source folder) and ``reanalysis`` (estimator and
what was and was not recomputed). The source folder is only read.

- A point without a capture is copied as stored and listed in
  ``reanalysis.not_recomputed`` (its values come from the original code and settings).
- A point averaged over several records kept only its last record: it is recomputed
  from that one record and listed in ``reanalysis.single_record``.
- ``clipped`` is carried over from the stored row: a capture holds volts, not the
  screen window it was taken with.
- A run with no capture at all is refused (an ``InputError``).

Then summary.json (loop figures of the last sweep, limits, verdict; the closed-loop
result is carried over, it is not in the captures) and the report.
"""

from __future__ import annotations

import math
import shutil
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import yaml
from rich.console import Console

from loopwright.errors import EstimationError, InputError, LoopwrightError
from loopwright.instruments.roles import Capture, ChannelSettings
from loopwright.procedure.measure import PointMeasurer, QualityLimits
from loopwright.procedure.replay import check_replayable
from loopwright.procedure.results import loop_figures, point_row, summary_record
from loopwright.procedure.runner import _render
from loopwright.procedure.schema import Procedure, SweepStep, loads_procedure
from loopwright.store.load import mismatch_at
from loopwright.store.names import utc_iso
from loopwright.store.writer import CALIBRATION_FILE, CAPTURES_DIR, CLOSED_LOOP_FILE, RunFolder

#: Channel numbers the stored records are handed back on (labels only).
REFERENCE, RESPONSE = 1, 2
#: Manifest fields of the source that describe one run's life, not its set-up.
_NOT_CARRIED = ("format", "status", "reason", "started_utc", "ended_utc", "calibration",
                "output_off_confirmed", "replay_of", "reanalysis_of", "reanalysis")


@dataclass
class ReanalysisOutcome:
    """What a reanalysis left behind."""

    run_dir: Path
    summary: dict[str, Any]
    recomputed: list[int]
    not_recomputed: list[int]
    single_record: list[int]


class StoredCaptures:
    """A scope that hands back one stored record (the Scope role's acquire/set_channel).

    Parameters
    ----------
    capture
        The record, on channels :data:`REFERENCE` and :data:`RESPONSE`.
    """

    def __init__(self, capture: Capture) -> None:
        self.capture = capture
        self.settings: dict[int, ChannelSettings] = {}

    def set_channel(self, channel: int, settings: ChannelSettings) -> None:
        """Keep the settings (they only label the row's scales)."""
        self.settings[channel] = settings

    def acquire(self, channels: Sequence[int], timeout_s: float = 10.0) -> Capture:
        """The stored record."""
        return self.capture


def _read_capture(path: Path) -> dict[str, Any]:
    try:
        with np.load(path, allow_pickle=False) as data:
            out = {key: data[key] for key in ("reference_v", "response_v", "sample_rate_hz",
                                              "frequency_hz")}
    except (OSError, ValueError, KeyError, zipfile.BadZipFile) as exc:
        # a truncated or overwritten .npz is a damaged zip archive
        raise InputError(f"cannot read the capture: {exc}", path=str(path)) from exc
    return out


def _procedure_of(run: Any) -> Procedure:
    record = run.manifest.get("procedure")
    if not isinstance(record, dict):
        raise InputError("the manifest holds no procedure", field="procedure",
                         path=str(run.path / "manifest.json"))
    return loads_procedure(yaml.safe_dump(record, sort_keys=False),
                           str(run.path / "manifest.json"))


def _number(value: Any) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        return math.nan
    return number


def recompute_point(row: dict[str, Any], capture: dict[str, Any], step: Any, sign: int,
                    estimator: str, correction: Any) -> dict[str, Any]:
    """One stored point recomputed from its record: the row to append (as the runner's).

    Raises
    ------
    EstimationError
        The record cannot be estimated with this estimator.
    """
    flags = str(row.get("flags") or "")
    record = Capture(
        sample_rate_hz=float(capture["sample_rate_hz"]),
        volts={REFERENCE: np.asarray(capture["reference_v"], dtype=float),
               RESPONSE: np.asarray(capture["response_v"], dtype=float)},
        adc_clipped={REFERENCE: "clipped" in flags.split(";")})
    scales = {REFERENCE: _number(row.get("reference_scale_v_per_div")),
              RESPONSE: _number(row.get("response_scale_v_per_div"))}
    settings = {channel: ChannelSettings(scale if math.isfinite(scale) else 1.0)
                for channel, scale in scales.items()}
    quality = QualityLimits(min_snr_db=getattr(step, "flag_snr_below_db", 20.0),
                            max_thd_pct=getattr(step, "flag_thd_above_pct", 5.0))
    measurer = PointMeasurer(StoredCaptures(record), REFERENCE, RESPONSE, settings,
                             estimator=estimator, quality=quality)
    result = measurer.measure(float(row["frequency_hz"]), averages=1, autorange=False,
                              correction=correction)
    # the columns and formulas of the runner; the scales as stored (a record holds volts)
    return {
        "index": int(row["index"]),
        "timestamp_utc": row.get("timestamp_utc") or None,
        **point_row(int(row["step"]), float(row["frequency_hz"]), float(row["amplitude_vpp"]),
                    result, sign, int(row.get("refined") or 0)),
        "reference_scale_v_per_div": scales[REFERENCE],
        "response_scale_v_per_div": scales[RESPONSE],
    }


def _stored_row(row: dict[str, Any]) -> dict[str, Any]:
    """A stored row as it is (empty cells stay empty)."""
    out = {}
    for key, value in row.items():
        if isinstance(value, float) and math.isnan(value):
            continue
        out[key] = value
    return out


def loop_analysis(frequency_hz: Sequence[float], h: Sequence[complex]
                  ) -> dict[str, Any] | None:
    """The loop figures of one sweep as the runner computes them, or None.

    Parameters
    ----------
    frequency_hz, h
        The sweep's points in any order (:func:`loop_figures` sorts them and drops
        repeated frequencies).

    Returns
    -------
    dict or None
        None with fewer than 2 points or when the points give no loop figures.
    """
    if len(frequency_hz) < 2:
        return None
    try:
        return loop_figures(frequency_hz, h)
    except LoopwrightError:
        return None


def reanalyze_run(run_dir: str | Path, *, estimator: str | None = None,
                  out_dir: str | Path | None = None, render_report: bool = True
                  ) -> ReanalysisOutcome:
    """Recompute a stored run from its raw captures into a new run folder.

    Parameters
    ----------
    run_dir
        The source run folder (only read).
    estimator
        ``sinefit``, ``dft`` or ``xcorr`` for every point (default: each sweep's own).
    out_dir
        Folder for the new run folder (default: the source run's parent).

    Raises
    ------
    InputError
        Not a run, no points, no raw captures, an unreadable capture.
    """
    from loopwright.dsp import ESTIMATORS

    if estimator is not None and estimator not in ESTIMATORS:
        raise InputError(f"unknown estimator {estimator!r}; known: {', '.join(ESTIMATORS)}",
                         field="estimator")
    run = check_replayable(run_dir)
    source = run.path.resolve()
    captures = source / CAPTURES_DIR
    if not captures.is_dir() or not any(captures.glob("point_*.npz")):
        raise InputError("the run kept no raw captures (captures/point_NNNNN.npz); "
                         "reanalysis needs a sweep with keep_captures: true", path=str(source))
    procedure = _procedure_of(run)
    calibration = run.calibration
    correction = None
    if calibration is not None:
        cal_f, cal_m = calibration

        def correction(f: float) -> complex:
            return complex(mismatch_at(f, cal_f, cal_m))

    manifest = {k: v for k, v in run.manifest.items() if k not in _NOT_CARRIED}
    manifest["reanalysis_of"] = str(source)
    target = Path(out_dir) if out_dir is not None else source.parent
    folder = RunFolder.create(target, procedure.name, str(run.manifest.get("serial") or
                                                         "no-serial"), manifest,
                              now=datetime.now().astimezone())
    recomputed: list[int] = []
    copied: list[int] = []
    single: list[int] = []
    per_step: dict[int, tuple[list[float], list[complex]]] = {}
    with folder:
        if calibration is not None:
            shutil.copy2(source / CALIBRATION_FILE, folder.path / CALIBRATION_FILE)
            folder.update_manifest(calibration=CALIBRATION_FILE)
        if (source / CLOSED_LOOP_FILE).exists():
            shutil.copy2(source / CLOSED_LOOP_FILE, folder.path / CLOSED_LOOP_FILE)
        rows = run.points.sort_values("index", kind="stable").to_dict("records")
        for row in rows:
            index, step_index = int(row["index"]), int(row["step"])
            step = procedure.steps[step_index] if step_index < len(procedure.steps) else None
            path = captures / f"point_{index:05d}.npz"
            if path.exists():
                method = estimator or (step.estimator if isinstance(step, SweepStep)
                                       else "sinefit")
                try:
                    new_row = recompute_point(row, _read_capture(path), step, run.sign,
                                              method, correction)
                except EstimationError as exc:
                    raise InputError(f"point {index}: {exc}", path=str(path)) from exc
                recomputed.append(index)
                if _number(row.get("averages")) > 1:
                    single.append(index)
            else:
                new_row = _stored_row(row)
                copied.append(index)
            folder.append_point(new_row)
            f_list, h_list = per_step.setdefault(step_index, ([], []))
            f_list.append(float(new_row["frequency_hz"]))
            h_list.append(complex(float(new_row["gain_re"]), float(new_row["gain_im"])))
        note = (f"{len(recomputed)} of {len(rows)} points recomputed from their raw captures"
                f" with the present code")
        if copied:
            note += f"; {len(copied)} without a capture copied as stored (not recomputed)"
        if single:
            note += (f"; {len(single)} averaged point(s) recomputed from their last record"
                     " only")
        folder.update_manifest(reanalysis={
            "estimator": estimator or "as in the procedure",
            "recomputed": recomputed,
            "not_recomputed": copied,
            "single_record": single,
            "note": note,
        }, reanalysed_utc=utc_iso(datetime.now().astimezone()))
        summary = build_summary(procedure, per_step, run.summary, folder)
        folder.write_summary(summary)
        folder.finish("complete", None)
    if render_report:
        # as after a run: a report that cannot be drawn is a warning, the folder is done
        _render(folder.path, Console(stderr=True))
    return ReanalysisOutcome(folder.path, summary, recomputed, copied, single)


def build_summary(procedure: Procedure,
                  per_step: dict[int, tuple[list[float], list[complex]]],
                  source_summary: dict[str, Any] | None, folder: RunFolder) -> dict[str, Any]:
    """summary.json as the runner writes it: figures of the last sweep with points,
    limits and verdict; the closed-loop result carried over from the source."""
    analysis = None
    for step_index in sorted(per_step):
        figures = loop_analysis(*per_step[step_index])
        if figures is not None:
            analysis = figures
    closed_loop = (source_summary or {}).get("closed_loop")
    flagged = sum(1 for p in folder.done_points if str(p.get("flags") or ""))
    return summary_record(procedure, analysis, closed_loop, len(folder.done_points), flagged)


__all__ = ["ReanalysisOutcome", "StoredCaptures", "build_summary", "loop_analysis",
           "reanalyze_run", "recompute_point"]
