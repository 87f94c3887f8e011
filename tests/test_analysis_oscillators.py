"""Textbook oscillator loops and a series RLC resonance.

Sources: Sedra & Smith, Microelectronic Circuits 7th ed. ch. 18 (mem); Boylestad &
Nashelsky, Electronic Devices and Circuit Theory 11th ed. ch. 14 (mem); values in
references.md. Ideal amplifiers, unloaded networks. Each loop is built at a gain 10 %
above the critical one, so the Barkhausen criterion is met with excess gain 1.1.
"""

from __future__ import annotations

import numpy as np
import pytest

from loopwright.analysis import FrequencyResponse, analyze_loop

R_OHM = 10e3
C_F = 10e-9
FREQ_RTOL = 3e-3  # the requirement: textbook frequency within 0.3 %
EXCESS_RTOL = 5e-3  # excess gain within 0.5 %


def _sweep(start_hz: float, stop_hz: float, per_decade: int) -> np.ndarray:
    points = round(np.log10(stop_hz / start_hz) * per_decade) + 1
    return np.logspace(np.log10(start_hz), np.log10(stop_hz), points)


def wien_loop(frequency_hz: np.ndarray, amplifier_gain: float) -> np.ndarray:
    """Non-inverting amplifier with a Wien network: beta = 1/(3 + j(wRC - 1/(wRC)))."""
    x = 2 * np.pi * frequency_hz * R_OHM * C_F
    return amplifier_gain / (3 + 1j * (x - 1 / x))


def ladder_loop(frequency_hz: np.ndarray, amplifier_gain: float) -> np.ndarray:
    """Inverting amplifier (-gain) with a three-section CR ladder:
    beta = (sRC)^3 / ((sRC)^3 + 6 (sRC)^2 + 5 sRC + 1)."""
    s = 2j * np.pi * frequency_hz * R_OHM * C_F
    beta = s**3 / (s**3 + 6 * s**2 + 5 * s + 1)
    return -amplifier_gain * beta


@pytest.mark.parametrize("per_decade", [8, 20])
def test_wien_bridge(per_decade) -> None:
    # Sedra & Smith ch. 18 (mem): f0 = 1/(2 pi R C), beta = 1/3, gain 3 at critical.
    f0 = 1 / (2 * np.pi * R_OHM * C_F)
    f = _sweep(10.0, 1e5, per_decade)
    figures = analyze_loop(FrequencyResponse(f, wien_loop(f, 3 * 1.1)))
    assert figures.oscillation_predicted
    assert len(figures.zero_phase_crossings) == 1
    crossing = figures.zero_phase_crossings[0]
    assert crossing.barkhausen_met
    assert crossing.frequency_hz == pytest.approx(f0, rel=FREQ_RTOL)
    assert crossing.excess_gain == pytest.approx(1.1, rel=EXCESS_RTOL)
    assert figures.to_dict()["oscillation_frequency_hz"] == pytest.approx(f0, rel=FREQ_RTOL)
    assert figures.to_dict()["excess_gain"] == pytest.approx(1.1, rel=EXCESS_RTOL)


def test_wien_bridge_below_critical_does_not_oscillate() -> None:
    # Sedra & Smith ch. 18 (mem): gain 3 is critical; at 2.7 the loop gain is 0.9.
    f = _sweep(10.0, 1e5, 8)
    figures = analyze_loop(FrequencyResponse(f, wien_loop(f, 2.7)))
    assert not figures.oscillation_predicted
    crossing = figures.zero_phase_crossings[0]
    assert crossing.loop_gain == pytest.approx(0.9, rel=EXCESS_RTOL)
    assert crossing.excess_gain is None
    assert crossing.gain_margin_db == pytest.approx(-20 * np.log10(0.9), abs=0.05)


@pytest.mark.parametrize("per_decade", [8, 20])
def test_phase_shift_ladder(per_decade) -> None:
    # Boylestad & Nashelsky ch. 14 (mem): f0 = 1/(2 pi R C sqrt 6), beta = -1/29,
    # an inverting gain of 29 at critical.
    f0 = 1 / (2 * np.pi * R_OHM * C_F * np.sqrt(6))
    f = _sweep(10.0, 1e5, per_decade)
    figures = analyze_loop(FrequencyResponse(f, ladder_loop(f, 29 * 1.1)))
    met = [c for c in figures.zero_phase_crossings if c.barkhausen_met]
    assert len(met) == 1
    assert met[0].frequency_hz == pytest.approx(f0, rel=FREQ_RTOL)
    assert met[0].excess_gain == pytest.approx(1.1, rel=EXCESS_RTOL)
    assert figures.oscillation is met[0]


def test_ladder_with_sign_flip_for_a_probe_without_the_inversion() -> None:
    # Same ladder, recorded without the amplifier's inversion: --sign -1 restores it.
    f0 = 1 / (2 * np.pi * R_OHM * C_F * np.sqrt(6))
    f = _sweep(10.0, 1e5, 20)
    figures = analyze_loop(FrequencyResponse(f, -ladder_loop(f, 29 * 1.1)), sign=-1)
    assert figures.oscillation.frequency_hz == pytest.approx(f0, rel=FREQ_RTOL)
    unflipped = analyze_loop(FrequencyResponse(f, -ladder_loop(f, 29 * 1.1)))
    assert not unflipped.oscillation_predicted


def series_rlc_resistor_voltage(frequency_hz: np.ndarray) -> np.ndarray:
    """V_R / V_in of a series RLC: sRC / (s^2 LC + sRC + 1), 10 ohm, 1 mH, 100 nF."""
    r, ell, c = 10.0, 1e-3, 100e-9
    s = 2j * np.pi * frequency_hz
    return s * r * c / (s**2 * ell * c + s * r * c + 1)


@pytest.mark.parametrize("per_decade", [8, 40])
def test_series_rlc_q(per_decade) -> None:
    # references.md (measured): 10 ohm, 1 mH, 100 nF -> f0 = 15,915.494 Hz, Q = 10,
    # bandwidth f0/Q (Q = sqrt(L/C)/R, textbook).
    f = _sweep(1e3, 1e5, per_decade)
    figures = analyze_loop(FrequencyResponse(f, series_rlc_resistor_voltage(f)))
    assert len(figures.resonances) == 1
    peak = figures.resonances[0]
    assert peak.frequency_hz == pytest.approx(15915.494, rel=1e-6)
    assert peak.peak_db == pytest.approx(0.0, abs=1e-6)
    assert peak.q == pytest.approx(10.0, rel=1e-3)
    assert peak.bandwidth_hz == pytest.approx(1591.5494, rel=1e-3)


def test_series_rlc_q_from_the_width_when_the_model_is_not_trusted() -> None:
    # Same circuit, noisy and dense: the fallback model gives Q from the -3 dB points.
    rng = np.random.default_rng(11)
    f = _sweep(1e3, 1e5, 200)
    h = series_rlc_resistor_voltage(f) * 10 ** (rng.normal(0, 0.02, f.size) / 20)
    figures = analyze_loop(FrequencyResponse(f, h, np.full(f.size, 0.02), np.zeros(f.size)))
    assert figures.interpolation == "pchip"
    peak = max(figures.resonances, key=lambda r: r.peak_db)
    assert peak.q_method == "3db_width"
    assert peak.q == pytest.approx(10.0, rel=0.03)
    assert peak.frequency_hz == pytest.approx(15915.494, rel=5e-3)
