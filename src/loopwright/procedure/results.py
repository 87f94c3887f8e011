"""What a run records from its measurements, shared by the runner and the reanalysis.

One measured point becomes one points.csv row (:func:`point_row`), the points of one
sweep become its loop figures (:func:`loop_figures`), and the figures, limits and point
counts become summary.json (:func:`summary_record`). The reanalysis calls the same
functions as the runner, so a point recomputed from its stored record is written with
the runner's formulas, bit for bit.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from loopwright.analysis import FrequencyResponse, analyze_loop
from loopwright.procedure.measure import PointResult
from loopwright.procedure.schema import Procedure, evaluate_limits

__all__ = ["loop_figures", "point_row", "summary_record"]


def point_row(step_index: int, nominal_hz: float, amplitude_vpp: float, result: PointResult,
              sign: int, refined: bool | int) -> dict[str, Any]:
    """The points.csv row of one measured point (without ``index`` and ``timestamp_utc``).

    Parameters
    ----------
    step_index
        The procedure step the point belongs to.
    nominal_hz, amplitude_vpp
        The stimulus as set on the generator.
    result
        The measured point.
    sign
        The procedure's sign (+1 or -1), applied to the measured ratio.
    refined
        Whether the point was added by the refinement of a sweep.

    Returns
    -------
    dict
        Column -> value; ``gain_re`` and ``gain_im`` are the stored (signed) ``H``.
    """
    gain = sign * result.gain
    return {
        "step": step_index,
        "frequency_hz": nominal_hz,
        "amplitude_vpp": amplitude_vpp,
        "gain_db": 20 * math.log10(max(abs(gain), 1e-300)),
        "phase_deg": math.degrees(math.atan2(gain.imag, gain.real)),
        "gain_re": gain.real,
        "gain_im": gain.imag,
        "gain_db_std": result.gain_db_std,
        "phase_deg_std": result.phase_deg_std,
        "reference_amplitude_v": result.reference_amplitude_v,
        "response_amplitude_v": result.response_amplitude_v,
        "reference_snr_db": result.reference_snr_db,
        "response_snr_db": result.response_snr_db,
        "reference_thd_pct": result.reference_thd_pct,
        "response_thd_pct": result.response_thd_pct,
        "reference_scale_v_per_div": result.reference_scale_v_per_div,
        "response_scale_v_per_div": result.response_scale_v_per_div,
        "sample_rate_hz": result.sample_rate_hz,
        "record_length": result.record_length,
        "averages": result.averages,
        "refined": int(refined),
        "flags": result.flags,
    }


def loop_figures(frequency_hz: Sequence[float], h: Sequence[complex]) -> dict[str, Any]:
    """The loop figures of one sweep: its points sorted by frequency, repeats dropped.

    Parameters
    ----------
    frequency_hz, h
        The sweep's points in the order measured (at least 2).

    Raises
    ------
    LoopwrightError
        The points give no loop figures (too few distinct frequencies, ...).
    """
    order = np.argsort(frequency_hz)
    f = np.asarray(frequency_hz, dtype=float)[order]
    gains = np.asarray(h, dtype=complex)[order]
    keep = np.concatenate(([True], np.diff(f) > 0))
    return analyze_loop(FrequencyResponse(f[keep], gains[keep])).to_dict()


def summary_record(procedure: Procedure, analysis: dict[str, Any] | None,
                   closed_loop: dict[str, Any] | None, points: int, flagged_points: int
                   ) -> dict[str, Any]:
    """summary.json: loop figures, the procedure's limits with the verdict, point counts."""
    limits, verdict = evaluate_limits(list(procedure.limits), analysis, closed_loop)
    return {
        "analysis": analysis,
        "limits": limits,
        "verdict": verdict,
        "closed_loop": closed_loop,
        "points": points,
        "flagged_points": flagged_points,
    }
