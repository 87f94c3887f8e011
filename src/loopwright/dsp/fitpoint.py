"""The ``sinefit`` estimator: four-parameter fit on the reference, three on both.

The frequency is refined on the reference (IEEE Std 1057 four-parameter fit from an
interpolated DFT peak), then both channels get a three-parameter fit at that frequency
with harmonic columns up to order 9. ``H`` is the ratio of the two fundamental
phasors. A frequency error common to both channels shifts both phases alike, so the
phase difference keeps the known-frequency Cramer-Rao form
``var(dphi) ~ 1/(N eta1) + 1/(N eta2)``; the reported std is that form, evaluated
exactly from each fit's covariance ``sigma^2 G^-1`` with ``sigma^2`` the residual
variance (harmonics fitted, so they are not counted as noise).
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from loopwright.dsp.estimate import register_estimator
from loopwright.dsp.point import (
    ChannelEstimate,
    PointEstimate,
    make_point,
    no_reference_error,
    snr_db,
    wrap_phase_deg,
)
from loopwright.dsp.sinefit import SineFit, fit_sine_3p, fit_sine_4p

__all__ = ["channel_from_fit", "estimate_sinefit"]


def channel_from_fit(fit: SineFit) -> ChannelEstimate:
    """Per-channel figures of a one-record :class:`SineFit`."""
    amp = float(fit.amplitude_v)
    noise_var = float(fit.noise_var_v2)
    return ChannelEstimate(
        amplitude_v=amp,
        phase_deg=wrap_phase_deg(math.degrees(float(fit.phase_rad))),
        offset_v=float(fit.offset_v),
        snr_db=snr_db(amp, noise_var),
        thd_pct=float(fit.thd_pct) if amp > 0 else math.nan,
        noise_rms_v=math.sqrt(noise_var),
    )


@register_estimator("sinefit")
def estimate_sinefit(
    reference_v: NDArray[np.float64],
    response_v: NDArray[np.float64],
    sample_rate_hz: float,
    frequency_hz: float,
    *,
    harmonics: int = 9,
    refine: bool = True,
    max_offset_ppm: float = 500.0,
) -> PointEstimate:
    """Gain/phase by least-squares sine fits (the default estimator).

    Parameters
    ----------
    reference_v, response_v, sample_rate_hz, frequency_hz
        As for :func:`loopwright.dsp.estimate_point`.
    harmonics
        Highest harmonic order fitted (orders below Nyquist only); 1 fits none.
    refine
        Refine the frequency with a four-parameter fit on the reference (True), or fit
        at ``frequency_hz`` exactly (False: only for a shared, exact clock).
    max_offset_ppm
        How far the true frequency may be from ``frequency_hz`` (search for the start).

    Notes
    -----
    Uncertainty: ``var(ln|H|) = var(ln A_ref) + var(ln A_resp)`` and
    ``var(arg H) = var(theta_ref) + var(theta_resp)``, each from the fit covariance and
    the residual variance (independent white noise on the two channels assumed).
    """
    if refine:
        ref_fit = fit_sine_4p(reference_v, sample_rate_hz, frequency_hz, harmonics, max_offset_ppm)
    else:
        ref_fit = fit_sine_3p(reference_v, sample_rate_hz, frequency_hz, harmonics)
    resp_fit = fit_sine_3p(response_v, sample_rate_hz, ref_fit.frequency_hz, harmonics)
    if float(ref_fit.amplitude_v) == 0.0:
        raise no_reference_error(frequency_hz)
    gain = complex(resp_fit.phasor / ref_fit.phasor)
    vl_ref, vp_ref = ref_fit.log_amplitude_phase_var
    vl_resp, vp_resp = resp_fit.log_amplitude_phase_var
    details = {
        "nominal_frequency_hz": frequency_hz,
        "iterations": ref_fit.iterations,
        "harmonics_fitted": int(ref_fit.cos_v.shape[-1]),
    }
    return make_point(
        ref_fit.frequency_hz,
        gain,
        float(vl_ref + vl_resp),
        float(vp_ref + vp_resp),
        channel_from_fit(ref_fit),
        channel_from_fit(resp_fit),
        "sinefit",
        details,
    )
