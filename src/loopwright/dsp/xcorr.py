"""The ``xcorr`` estimator: the averaged cross-spectrum at the stimulus frequency.

The record is cut into ``segments`` equal pieces; each is windowed and its DTFT taken
exactly at ``f`` (no sample grid: the phase of the cross-spectrum carries any delay,
not a whole number of samples). With ``X_i``, ``Y_i`` the reference and response DTFTs
of segment ``i``::

    S_xy = mean(conj(X_i) Y_i),   S_xx = mean |X_i|^2,   H = S_xy / S_xx

(the H1 form). It needs no coherent phase between segments, so it also serves
non-sinusoidal or noise stimuli. Noise on the reference biases ``|H|`` low by
``1 / (1 + 1/snr_bin)`` with ``snr_bin`` the per-bin SNR of a segment (small for a sine
stimulus: ``snr_bin = L eta / ENBW``).
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from loopwright.dsp.dft import phasor_log_var
from loopwright.dsp.estimate import register_estimator
from loopwright.dsp.point import (
    PointEstimate,
    channel_from_phasors,
    make_point,
    no_reference_error,
)
from loopwright.dsp.sinefit import stimulus_harmonics
from loopwright.dsp.tonesums import data_sums
from loopwright.dsp.windows import check_window, make_window, spectral_noise_var
from loopwright.errors import EstimationError

__all__ = ["estimate_xcorr"]

MIN_SEGMENT_CYCLES = 2.0
MIN_SEGMENT_LEN = 64
NYQUIST_GUARD_BINS = 4.0


def _segment_phasors(y: NDArray[np.float64], n_seg: int, seg_len: int, window: NDArray,
                     thetas: NDArray) -> tuple[NDArray, float]:
    """Per-segment windowed DTFTs ``(n_seg, H)`` and the offset.

    Each segment loses its window-weighted mean first, which keeps a DC offset from
    leaking into the fundamental of short segments.
    """
    seg = y[: n_seg * seg_len].reshape(n_seg, seg_len)
    means = (seg @ window) / float(window.sum())
    z = (seg - means[:, None]) * window
    x, _ = data_sums(z, thetas)
    return x, float(means.mean())


@register_estimator("xcorr")
def estimate_xcorr(
    reference_v: NDArray[np.float64],
    response_v: NDArray[np.float64],
    sample_rate_hz: float,
    frequency_hz: float,
    *,
    segments: int | None = None,
    window: str = "hann",
    harmonics: int = 9,
) -> PointEstimate:
    """Gain/phase from the segment-averaged cross-spectrum at the stimulus frequency.

    Parameters
    ----------
    reference_v, response_v, sample_rate_hz, frequency_hz
        As for :func:`loopwright.dsp.estimate_point`.
    segments
        Number of segments averaged; default one per 8 cycles, 1 to 32.
    window
        Window applied to each segment (see :data:`loopwright.dsp.windows.WINDOWS`).
    harmonics
        Highest harmonic order evaluated for THD.

    Notes
    -----
    Uncertainty: with 4 segments or more, from the coherence
    ``g2 = |S_xy|^2 / (S_xx S_yy)``: ``var(ln|H|) = var(arg H) = (1 - g2) / (2 n g2)``
    (Bendat & Piersol, Random Data, the H1 estimate (mem)). With fewer segments, from
    each channel's noise floor (median of the periodogram) as for the ``dft``
    estimator, divided by the number of segments. Channel amplitude and phase are
    the coherent average of the segments aligned to t = 0 (meaningful for periodic
    stimuli); SNR and noise come from the periodogram of the whole record.
    """
    check_window(window)
    n = reference_v.size
    cycles = frequency_hz * n / sample_rate_hz
    # a segment needs MIN_SEGMENT_CYCLES cycles, MIN_SEGMENT_LEN samples, and the
    # stimulus a few bins below the segment's Nyquist (its image leaks otherwise)
    nyquist_room = 0.5 - frequency_hz / sample_rate_hz  # cycles/sample
    min_len = max(MIN_SEGMENT_LEN, math.ceil(NYQUIST_GUARD_BINS / nyquist_room))
    max_seg = max(1, min(int(cycles // MIN_SEGMENT_CYCLES), n // min_len))
    if segments is None:
        n_seg = int(np.clip(cycles // 8, 1, min(32, max_seg)))
    else:
        n_seg = int(segments)
        if n_seg < 1 or n_seg > max_seg:
            raise EstimationError(
                f"segments={segments}: each segment needs at least {MIN_SEGMENT_CYCLES:g} "
                f"cycles and {min_len} samples here; use 1 to {max_seg} segments"
            )
    seg_len = n // n_seg
    theta, n_harm = stimulus_harmonics(frequency_hz, sample_rate_hz, seg_len, harmonics)
    thetas = theta * np.arange(1, n_harm + 1)
    w = make_window(window, seg_len)
    sw = float(w.sum())
    xr, off_r = _segment_phasors(reference_v, n_seg, seg_len, w, thetas)
    xs, off_s = _segment_phasors(response_v, n_seg, seg_len, w, thetas)
    s_xy = complex(np.mean(np.conj(xr[:, 0]) * xs[:, 0]))
    s_xx = float(np.mean(np.abs(xr[:, 0]) ** 2))
    s_yy = float(np.mean(np.abs(xs[:, 0]) ** 2))
    if s_xx == 0:
        raise no_reference_error(frequency_hz)
    gain = s_xy / s_xx
    # align segment i (starting at sample i L) to t = 0, then average coherently
    starts = np.arange(n_seg)[:, None] * seg_len
    align = np.exp(-1j * starts * thetas[None, :])
    channels = []
    noise = []
    coherent = []
    for x, y, off in ((xr, reference_v, off_r), (xs, response_v, off_s)):
        phasors = 2.0 * np.mean(x * align, axis=0) / sw
        amps = np.abs(phasors)
        nv = spectral_noise_var(y, window, theta, n_harm)
        if not math.isfinite(nv):
            nv = max(float(np.var(y)) - float(np.sum(amps**2)) / 2.0, 0.0)
        noise.append(nv)
        coherent.append(complex(phasors[0]) * sw / 2.0)
        channels.append(channel_from_phasors(phasors, off, nv))
    if n_seg >= 4:
        coh2 = min(abs(s_xy) ** 2 / (s_xx * s_yy), 1.0) if s_yy > 0 else 0.0
        var = (1.0 - coh2) / (2.0 * n_seg * coh2) if coh2 > 0 else math.inf
        std_from = "coherence"
    else:
        var = phasor_log_var(noise[0], w, coherent[0], n_seg) + phasor_log_var(
            noise[1], w, coherent[1], n_seg
        )
        std_from = "noise floor"
    details = {"segments": n_seg, "window": window, "std_from": std_from}
    return make_point(frequency_hz, gain, var, var, channels[0], channels[1], "xcorr", details)
