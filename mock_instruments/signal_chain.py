"""What the scope does to the probe-tip voltage: timing, coupling, noise, ADC.

Pure functions on numpy arrays (inputs are never modified). Volts are probe-tip volts
throughout: a scope that knows the probe attenuation shows tip volts on its screen, so
the screen window and the quantisation step are in tip volts too.
"""

from __future__ import annotations

import numpy as np

#: Vertical divisions of the screen (the ADC spans offset +- 4 div).
SCREEN_DIVISIONS = 8


def sample_times(t_start_s: float, record_length: int, sample_rate_hz: float,
                 clock_offset_ppm: float = 0.0) -> np.ndarray:
    """True times of the samples of one record.

    The scope's clock runs ``clock_offset_ppm`` fast against the generator's: it believes
    it samples at ``sample_rate_hz`` but really samples at ``sample_rate_hz * (1 + ppm
    1e-6)``, so a tone at f appears at ``f / (1 + ppm 1e-6)`` on the scope's time axis.
    """
    true_rate_hz = sample_rate_hz * (1.0 + clock_offset_ppm * 1e-6)
    return t_start_s + np.arange(record_length) / true_rate_hz


def screen_window_v(scale_v_per_div: float, offset_v: float) -> tuple[float, float]:
    """Lowest and highest tip voltage on screen (offset +- 4 div)."""
    half = scale_v_per_div * SCREEN_DIVISIONS / 2
    return offset_v - half, offset_v + half


def quantise(volts: np.ndarray, scale_v_per_div: float, offset_v: float,
             adc_bits: int) -> np.ndarray:
    """Quantise to ``adc_bits`` over the screen and clip at its edges.

    Codes 0 .. 2**bits - 1 map to ``low + code * step`` with ``step = 8 div * scale /
    2**bits``; anything off screen sticks at the first or last code. ``adc_bits = 0``
    is an ideal converter (no steps) that still clips at the screen edges.
    """
    low, high = screen_window_v(scale_v_per_div, offset_v)
    if adc_bits <= 0:
        return np.clip(volts, low, high)
    levels = 2 ** int(adc_bits)
    step = (high - low) / levels
    codes = np.clip(np.round((np.asarray(volts) - low) / step), 0, levels - 1)
    return low + codes * step


def quantisation_step_v(scale_v_per_div: float, adc_bits: int) -> float:
    """One ADC step in volts for a channel scale."""
    return scale_v_per_div * SCREEN_DIVISIONS / 2 ** int(adc_bits)


def white_noise(rng: np.random.Generator, rms_v: float, count: int) -> np.ndarray:
    """Gaussian white noise of ``rms_v`` volts rms (zeros when rms is 0)."""
    if rms_v <= 0:
        return np.zeros(count)
    return rng.normal(0.0, rms_v, count)


def next_rising_phase_zero_s(t_now_s: float, frequency_hz: float, phase_rad_at_ref: float,
                             t_ref_s: float) -> float:
    """First time at or after ``t_now_s`` where the generator's sine starts a cycle.

    The generator's phase is ``phase_rad_at_ref + 2 pi f (t - t_ref)``; its sine rises
    through zero where the phase is a multiple of 2 pi (the scope's edge trigger).
    """
    if frequency_hz <= 0:
        return t_now_s
    cycles_now = (phase_rad_at_ref / (2 * np.pi)) + frequency_hz * (t_now_s - t_ref_s)
    wait_cycles = np.ceil(cycles_now) - cycles_now
    return t_now_s + wait_cycles / frequency_hz
