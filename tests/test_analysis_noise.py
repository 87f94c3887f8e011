"""Noisy responses: the fallback model engages, and the reported uncertainty is honest.

Reference values: python-control ``stability_margins`` on the exact loop
2/(s(s+1)(s+2)) (references.md: PM 32.6131 deg, GM 9.5424 dB), time-scaled to
w = 1 rad/s at 10 kHz. Seeded Gaussian noise of known std is added to gain (dB) and
phase (deg), and the std columns carry that std, as a measured run's points do.
"""

from __future__ import annotations

import control  # the reference (test dependency): a missing one fails, never skips
import numpy as np
import pytest

from loopwright.analysis import FrequencyResponse, analyze_loop

F_SCALE_HZ = 1e4
TRIALS = 200


def _exact():
    system = control.tf([2], [1, 3, 2, 0])
    gm, pm, _sm, w_180, w_c, _ws = control.stability_margins(system)
    return system, {
        "pm": pm, "fc": w_c * F_SCALE_HZ, "gm_db": 20 * np.log10(gm), "f180": w_180 * F_SCALE_HZ,
    }


def _trials(gain_std_db: float, phase_std_deg: float, per_decade: int, seed: int,
            with_std: bool = True):
    system, _ = _exact()
    f = np.logspace(-2, 2, 4 * per_decade + 1) * F_SCALE_HZ
    loop = np.asarray(system(1j * f / F_SCALE_HZ))
    gain_db = 20 * np.log10(np.abs(loop))
    phase_deg = np.angle(-loop, deg=True)
    rng = np.random.default_rng(seed)
    noise_g = rng.normal(0.0, gain_std_db, (TRIALS, f.size))
    noise_p = rng.normal(0.0, phase_std_deg, (TRIALS, f.size))
    g_std, p_std = np.full(f.size, gain_std_db), np.full(f.size, phase_std_deg)
    if not with_std:
        g_std = p_std = None
    for k in range(TRIALS):
        response = FrequencyResponse.from_gain_phase(f, gain_db + noise_g[k],
                                                     phase_deg + noise_p[k], g_std, p_std)
        yield analyze_loop(response)


@pytest.mark.parametrize(("gain_std_db", "phase_std_deg", "per_decade", "with_std"),
                         [(0.1, 0.5, 20, True), (0.02, 0.1, 10, True), (0.1, 0.5, 20, False)])
def test_figures_within_their_uncertainty(gain_std_db, phase_std_deg, per_decade,
                                          with_std) -> None:
    # Without std columns the scatter is estimated from the data (second differences).
    _, exact = _exact()
    z = []
    methods = set()
    for figures in _trials(gain_std_db, phase_std_deg, per_decade, seed=7, with_std=with_std):
        methods.add(figures.interpolation)
        assert figures.uncertainty_source == (
            "std columns and model" if with_std else "scatter estimate and model")
        pm, gm = figures.worst_crossover, figures.worst_zero_phase
        z.append([
            (pm.phase_margin_deg - exact["pm"]) / pm.phase_margin_deg_std,
            (pm.frequency_hz - exact["fc"]) / pm.frequency_hz_std,
            (gm.gain_margin_db - exact["gm_db"]) / gm.gain_margin_db_std,
            (gm.frequency_hz - exact["f180"]) / gm.frequency_hz_std,
        ])
    z = np.array(z)
    assert methods == {"pchip"}  # the rational fit is refused on noisy data
    # within 3 sigma in at least 90 % of the trials, for each figure
    assert np.all(np.mean(np.abs(z) < 3.0, axis=0) >= 0.9)
    # and not inflated: the scatter is a fair share of the reported sigma
    assert np.all(np.std(z, axis=0) > 0.4)
    assert np.all(np.std(z, axis=0) < 1.6)


def test_noisy_oscillator_still_meets_barkhausen() -> None:
    # Wien bridge at 1.1 x critical gain (Sedra & Smith ch. 18 (mem)), 0.05 dB / 0.3 deg.
    rng = np.random.default_rng(5)
    f = np.logspace(1, 5, 81)
    x = 2 * np.pi * f * 10e3 * 10e-9
    h = 3.3 / (3 + 1j * (x - 1 / x))
    noisy = h * 10 ** (rng.normal(0, 0.05, f.size) / 20) * np.exp(
        1j * np.deg2rad(rng.normal(0, 0.3, f.size)))
    figures = analyze_loop(FrequencyResponse(f, noisy, np.full(f.size, 0.05),
                                             np.full(f.size, 0.3)))
    osc = figures.oscillation
    assert figures.interpolation == "pchip"
    assert osc is not None
    assert abs(osc.excess_gain - 1.1) < 3 * osc.loop_gain_std
    assert abs(osc.frequency_hz - 1 / (2 * np.pi * 1e-4)) < 3 * osc.frequency_hz_std


def test_uncertainty_of_exact_data_is_tiny() -> None:
    system, _ = _exact()
    f = np.logspace(-2, 2, 33) * F_SCALE_HZ
    figures = analyze_loop(FrequencyResponse(f, -np.asarray(system(1j * f / F_SCALE_HZ))))
    pm = figures.worst_crossover
    assert figures.interpolation == "aaa"
    assert figures.uncertainty_source == "model"
    assert pm.phase_margin_deg_std < 1e-6
    assert figures.worst_zero_phase.gain_margin_db_std < 1e-6


def test_scatter_estimate_recovers_the_noise_std() -> None:
    # Known seeded noise on a smooth loop at 20 points per decade.
    from loopwright.analysis.loop import scatter_std

    system, _ = _exact()
    f = np.logspace(-2, 2, 81) * F_SCALE_HZ
    loop = -np.asarray(system(1j * f / F_SCALE_HZ))
    rng = np.random.default_rng(9)
    estimates = []
    for _ in range(50):
        noisy = loop * 10 ** (rng.normal(0, 0.1, f.size) / 20) * np.exp(
            1j * np.deg2rad(rng.normal(0, 0.5, f.size)))
        estimates.append(scatter_std(FrequencyResponse(f, noisy)))
    gain_std, phase_std = np.mean(estimates, axis=0)
    assert gain_std == pytest.approx(0.1, rel=0.15)
    assert phase_std == pytest.approx(0.5, rel=0.15)


def test_noise_makes_no_resonances() -> None:
    # A loop without a resonance (4/(s+1)^3, references.md) and 0.5 dB of gain noise:
    # no peak stands out by 6 sigma, so none is reported.
    rng = np.random.default_rng(12)
    f = np.logspace(-2, 2, 81) * F_SCALE_HZ
    s = 1j * f / F_SCALE_HZ
    h = -4 / (s + 1) ** 3 * 10 ** (rng.normal(0, 0.5, f.size) / 20)
    figures = analyze_loop(FrequencyResponse(f, h, np.full(f.size, 0.5), np.full(f.size, 1.0)))
    assert figures.resonances == ()
    no_std = analyze_loop(FrequencyResponse(f, h))
    assert no_std.uncertainty_source == "scatter estimate and model"
    assert no_std.resonances == ()
