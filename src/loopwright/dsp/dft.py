"""The ``dft`` estimator: the windowed DTFT of each channel exactly at the stimulus.

Each channel, less its window-weighted mean, is multiplied by the window and its DTFT
is evaluated at ``f`` and its harmonics (not at the nearest bin, so there is no
scalloping loss and any number of cycles works); ``H = X_resp(f) / X_ref(f)``. The
frequency is taken as given (not refined).
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from loopwright.dsp.estimate import register_estimator
from loopwright.dsp.point import (
    ChannelEstimate,
    PointEstimate,
    channel_from_phasors,
    make_point,
    no_reference_error,
)
from loopwright.dsp.sinefit import stimulus_harmonics
from loopwright.dsp.tonesums import data_sums
from loopwright.dsp.windows import make_window, spectral_noise_var

__all__ = ["estimate_dft", "windowed_channel"]


def windowed_channel(
    y: NDArray[np.float64],
    window_name: str,
    theta: float,
    n_harm: int,
) -> tuple[ChannelEstimate, complex, float]:
    """Channel figures from the windowed DTFT; also the phasor and the noise variance.

    The noise variance comes from :func:`loopwright.dsp.windows.spectral_noise_var`
    (median of the periodogram away from DC and the tones), or, for records too short
    for that, from the variance left after the tones.
    """
    window = make_window(window_name, y.size)
    sw = float(window.sum())
    offset = float(window @ y) / sw
    z = (y - offset) * window
    x, _ = data_sums(z, theta * np.arange(1, n_harm + 1))
    phasors = 2.0 * x / sw  # A exp(j phase) per harmonic
    noise_var = spectral_noise_var(y, window_name, theta, n_harm)
    if not math.isfinite(noise_var):
        noise_var = max(float(np.mean((y - offset) ** 2))
                        - float(np.sum(np.abs(phasors) ** 2)) / 2.0, 0.0)
    return channel_from_phasors(phasors, offset, noise_var), complex(phasors[0]), noise_var


def phasor_log_var(noise_var: float, window: NDArray[np.float64], phasor: complex,
                   n_averages: int = 1) -> float:
    """Variance of ``ln|X|`` (equal to that of ``arg X``) for white noise.

    The DTFT noise has ``E|n|^2 = sigma^2 sum w^2``; with ``|X| = A sum w / 2`` this is
    ``2 sigma^2 sum w^2 / (A^2 (sum w)^2) = ENBW / (N eta)``: the Cramer-Rao bound
    times the window's equivalent noise bandwidth in bins.
    """
    amp2 = abs(phasor) ** 2
    if amp2 == 0:
        return math.inf
    return 2.0 * noise_var * float(window @ window) / (amp2 * float(window.sum()) ** 2) / n_averages


@register_estimator("dft")
def estimate_dft(
    reference_v: NDArray[np.float64],
    response_v: NDArray[np.float64],
    sample_rate_hz: float,
    frequency_hz: float,
    *,
    window: str = "hann",
    harmonics: int = 9,
) -> PointEstimate:
    """Gain/phase from the windowed DTFT at the stimulus frequency.

    Parameters
    ----------
    reference_v, response_v, sample_rate_hz, frequency_hz
        As for :func:`loopwright.dsp.estimate_point`.
    window
        ``hann`` (default), ``rectangular``, ``blackman-harris`` or ``flattop``.
    harmonics
        Highest harmonic order evaluated for THD.

    Notes
    -----
    Uncertainty: per channel ``var(ln|X|) = var(arg X) = ENBW / (N eta)`` with the
    noise variance of :func:`windowed_channel`; the two channels add. Leakage of the
    negative-frequency image and of other tones is not in the std: it is a bias,
    small for Hann and wider windows with a few cycles or more, large for the
    rectangular window with a non-integer number of cycles.
    """
    n = reference_v.size
    w = make_window(window, n)
    theta, n_harm = stimulus_harmonics(frequency_hz, sample_rate_hz, n, harmonics)
    ref, x_ref, nv_ref = windowed_channel(reference_v, window, theta, n_harm)
    resp, x_resp, nv_resp = windowed_channel(response_v, window, theta, n_harm)
    if x_ref == 0:
        raise no_reference_error(frequency_hz)
    var = phasor_log_var(nv_ref, w, x_ref) + phasor_log_var(nv_resp, w, x_resp)
    return make_point(frequency_hz, x_resp / x_ref, var, var, ref, resp, "dft",
                      {"window": window})
