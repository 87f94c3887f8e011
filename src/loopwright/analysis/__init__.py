"""loopwright.analysis: a frequency response -> loop figures. Pure numpy/scipy, no I/O
beyond reading a response's CSV file.

Public API::

    FrequencyResponse(frequency_hz, h, gain_db_std=None, phase_deg_std=None)
    FrequencyResponse.from_gain_phase(frequency_hz, gain_db, phase_deg, ...)
    FrequencyResponse.from_csv(path)
    FrequencyResponse.interpolate(frequency_hz) -> complex ndarray
    analyze_loop(response, sign=1) -> LoopFigures   (.to_dict() -> JSON)
"""

from loopwright.analysis.interpolate import ResponseModel, build_model
from loopwright.analysis.loop import (
    GainCrossover,
    LoopFigures,
    Resonance,
    ZeroPhaseCrossing,
    analyze_loop,
)
from loopwright.analysis.response import FrequencyResponse, wrap_deg

__all__ = [
    "FrequencyResponse",
    "GainCrossover",
    "LoopFigures",
    "Resonance",
    "ResponseModel",
    "ZeroPhaseCrossing",
    "analyze_loop",
    "build_model",
    "wrap_deg",
]
