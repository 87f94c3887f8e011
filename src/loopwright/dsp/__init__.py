"""loopwright.dsp: two waveforms -> one complex gain point. Pure numpy/scipy, no I/O.

Public API::

    estimate_point(reference_v, response_v, sample_rate_hz, frequency_hz,
                   method="sinefit", **options) -> PointEstimate
    ESTIMATORS            name -> estimator function ("sinefit", "dft", "xcorr")
    register_estimator    decorator adding an estimator to ESTIMATORS
    make_point            build a PointEstimate from H and the variances of ln|H|, arg H
    PointEstimate, ChannelEstimate
    fit_sine_3p, fit_sine_4p, SineFit     IEEE Std 1057 sine fits
    WINDOWS, window_metrics               windows of the dft/xcorr estimators
"""

from loopwright.dsp import dft, fitpoint, xcorr  # noqa: F401  (register the estimators)
from loopwright.dsp.estimate import ESTIMATORS, estimate_point, register_estimator
from loopwright.dsp.point import ChannelEstimate, PointEstimate, make_point, wrap_phase_deg
from loopwright.dsp.sinefit import SineFit, fit_sine_3p, fit_sine_4p
from loopwright.dsp.windows import WINDOWS, window_metrics

__all__ = [
    "ESTIMATORS",
    "WINDOWS",
    "ChannelEstimate",
    "PointEstimate",
    "SineFit",
    "estimate_point",
    "fit_sine_3p",
    "fit_sine_4p",
    "make_point",
    "register_estimator",
    "window_metrics",
    "wrap_phase_deg",
]
