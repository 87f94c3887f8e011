"""Choose an estimator by name: ``estimate_point(..., method="sinefit")``.

Estimators register themselves with :func:`register_estimator`; ``ESTIMATORS`` maps
each name to its function ``f(reference_v, response_v, sample_rate_hz, frequency_hz,
**options) -> PointEstimate``. The arrays reaching an estimator have passed
:func:`loopwright.dsp.point.check_records`.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable
from typing import Any

from numpy.typing import ArrayLike

from loopwright.dsp.point import PointEstimate, check_records
from loopwright.errors import EstimationError

__all__ = ["ESTIMATORS", "Estimator", "estimate_point", "register_estimator"]

Estimator = Callable[..., PointEstimate]

ESTIMATORS: dict[str, Estimator] = {}


def register_estimator(name: str) -> Callable[[Estimator], Estimator]:
    """Decorator: register an estimator under ``name`` (must be new)."""

    def decorate(func: Estimator) -> Estimator:
        if name in ESTIMATORS:
            raise ValueError(f"an estimator named {name!r} is already registered")
        ESTIMATORS[name] = func
        return func

    return decorate


def estimate_point(
    reference_v: ArrayLike,
    response_v: ArrayLike,
    sample_rate_hz: float,
    frequency_hz: float,
    method: str = "sinefit",
    **options: Any,
) -> PointEstimate:
    """One complex gain point ``H = response / reference`` from a two-channel record.

    Parameters
    ----------
    reference_v, response_v
        The two channels, same length, volts; sample ``n`` at ``t = n / sample_rate_hz``.
        Never modified.
    sample_rate_hz
        Sample rate of both channels.
    frequency_hz
        Nominal stimulus frequency.
    method
        ``"sinefit"`` (default; refines the frequency), ``"dft"`` or ``"xcorr"``; see
        ``ESTIMATORS``.
    **options
        Passed to the estimator (``harmonics``, ``window``, ``segments``, ...).

    Returns
    -------
    PointEstimate

    Raises
    ------
    EstimationError
        Unusable records (empty, mismatched, NaN/inf, frequency at or above Nyquist,
        fewer than two cycles, flat reference) or an unknown method or option.
    """
    try:
        estimator = ESTIMATORS[method]
    except KeyError:
        names = ", ".join(sorted(ESTIMATORS))
        raise EstimationError(f"unknown estimator {method!r}; choose one of: {names}") from None
    ref, resp = check_records(reference_v, response_v, sample_rate_hz, frequency_hz)
    _check_options(method, options)
    try:
        return estimator(ref, resp, float(sample_rate_hz), float(frequency_hz), **options)
    except TypeError as exc:
        if "unexpected keyword argument" in str(exc):
            raise EstimationError(f"estimator {method!r}: {exc}") from exc
        raise


def _check_options(method: str, options: dict[str, Any]) -> None:
    """Refuse option values no estimator can use (instead of clamping them silently)."""
    harmonics = options.get("harmonics", 1)
    if isinstance(harmonics, bool) or not isinstance(harmonics, numbers.Integral) \
            or harmonics < 1:
        raise EstimationError(
            f"estimator {method!r}: harmonics must be a whole number >= 1 (1 = the "
            f"fundamental alone), got {harmonics!r}")
    offset_ppm = options.get("max_offset_ppm", 0.0)
    if not (isinstance(offset_ppm, numbers.Real) and math.isfinite(offset_ppm)
            and offset_ppm >= 0):
        raise EstimationError(
            f"estimator {method!r}: max_offset_ppm must be a finite number >= 0, "
            f"got {offset_ppm!r}")
