"""The simulated bench's signal chain: exactness, settling, harmonics and impairments.

Phasors are found with a 3-parameter least-squares sine fit at the known frequency
(IEEE Std 1057 3-parameter fit) and, for the clock-offset check, the 4-parameter fit
(IEEE Std 1057, frequency refined by Gauss-Newton).
"""

from __future__ import annotations

import numpy as np
import pytest

from fake_clock import FakeClock
from loopwright.errors import InputError
from mock_instruments.bench import Impairments, SimulatedBench
from mock_instruments.duts import load_dut
from mock_instruments.signal_chain import quantisation_step_v

IDEAL = Impairments(adc_bits=0)


def fit_phasor(volts: np.ndarray, frequency_hz: float, sample_rate_hz: float,
               harmonic: int = 1) -> complex:
    """3-parameter sine fit (IEEE 1057): the complex amplitude at a known frequency."""
    t = np.arange(volts.size) / sample_rate_hz
    w = 2 * np.pi * frequency_hz * harmonic
    design = np.column_stack([np.cos(w * t), np.sin(w * t), np.ones_like(t)])
    a, b, _ = np.linalg.lstsq(design, volts, rcond=None)[0]
    return complex(a, -b)


def fit_frequency(volts: np.ndarray, guess_hz: float, sample_rate_hz: float) -> float:
    """4-parameter sine fit (IEEE 1057): refine the frequency by Gauss-Newton."""
    t = np.arange(volts.size) / sample_rate_hz
    f = guess_hz
    for _ in range(8):
        w = 2 * np.pi * f
        a, b, c = np.linalg.lstsq(np.column_stack([np.cos(w * t), np.sin(w * t),
                                                   np.ones_like(t)]), volts, rcond=None)[0]
        dw = (-a * np.sin(w * t) + b * np.cos(w * t)) * t
        design = np.column_stack([np.cos(w * t), np.sin(w * t), np.ones_like(t), dw])
        step = np.linalg.lstsq(design, volts - (a * np.cos(w * t) + b * np.sin(w * t) + c),
                               rcond=None)[0]
        f += step[3] / (2 * np.pi)
    return f


def settled_bench(dut, frequency_hz, impairments=IDEAL, amplitude_vpp=0.2, seed=1, **gen):
    clock = FakeClock(100.0)
    bench = SimulatedBench(dut, impairments, seed=seed, clock=clock)
    bench.apply_generator(frequency_hz=frequency_hz, amplitude_vpp=amplitude_vpp,
                          output_on=True, **gen)
    clock.advance(40 * bench.settling_time_constant_s())
    return bench, clock


def measured_ratio(bench, frequency_hz, cycles=20, points_per_cycle=64):
    fs = frequency_hz * points_per_cycle
    rec = bench.acquire(cycles * points_per_cycle, fs)
    return fit_phasor(rec[2], frequency_hz, fs) / fit_phasor(rec[1], frequency_hz, fs)


LINEAR = {"rational": {}, "lc_oscillator": {"current_limit_a": None},
          "wien": {"output_limit_v": None}, "phase_shift": {"output_limit_v": None},
          "buck_injection": {}, "opamp_capload": {}}


@pytest.mark.parametrize("name", sorted(LINEAR))
def test_acquired_ratio_equals_exact_response(name):
    # No impairments: the fitted ratio equals the model's exact response, which
    # test_duts checks against scipy.signal.freqs and python-control.
    dut = load_dut(name, **LINEAR[name])
    for f in dut_frequencies(name):
        bench, _ = settled_bench(dut, f)
        bench.channels[1].scale_v_per_div = bench.channels[2].scale_v_per_div = 1e9
        got = measured_ratio(bench, f)
        want = complex(bench.exact_response(f))
        assert abs(got / want - 1) < 1e-6, (name, f, got, want)


def dut_frequencies(name):
    return {"rational": [300.0, 5e3, 40e3], "lc_oscillator": [0.5e6, 1.4888e6, 3e6],
            "wien": [100.0, 1061.0, 9e3], "phase_shift": [1e3, 8.3e3, 50e3],
            "buck_injection": [200.0, 3e3, 30e3, 150e3],
            "opamp_capload": [1e3, 1e6, 4e6]}[name]


def test_repeated_poles_settle_and_measure_exactly():
    # 4/(s+1)^3 from references.md's margin table, moved to 1 kHz: a triple pole has
    # no eigenvector basis, so the transient is stepped with matrix exponentials.
    w = 2 * np.pi * 1000.0
    dut = load_dut("rational", numerator=[-4 * w**3], denominator=list(np.poly([-w, -w, -w])))
    bench, clock = settled_bench(dut, 2e3)
    bench.channels[2].scale_v_per_div = 1e9
    bench.apply_generator(frequency_hz=3e3)
    exact = complex(dut.loop_response(3e3))
    assert abs(measured_ratio(bench, 3e3) / exact - 1) > 1e-3
    clock.advance(40 / w)
    assert abs(measured_ratio(bench, 3e3) / exact - 1) < 1e-6
    # Gain margin 2 at w = sqrt(3) rad/s scaled: H = 4/8 at 0 degrees (references.md).
    assert complex(dut.loop_response(np.sqrt(3) * 1000.0)) == pytest.approx(0.5, abs=1e-12)


def test_unstable_open_loop_pole_shows_steady_response_without_overflow():
    # An open loop with a right-half-plane pole: the bench keeps its growing mode out of
    # the transient, so records stay finite after an hour of bench time.
    dut = load_dut("rational", poles_hz=[200.0, -5000.0], dc_gain=2.0)
    bench, clock = settled_bench(dut, 1e3)
    bench.channels[2].scale_v_per_div = 1e9
    clock.advance(3600.0)
    bench.apply_generator(frequency_hz=2e3)
    clock.advance(1.0)
    exact = complex(dut.loop_response(2e3))
    assert abs(measured_ratio(bench, 2e3) / exact - 1) < 1e-6


def test_delay_and_distortion_free_record_is_a_clean_sine():
    dut = load_dut("rational", delay_s=3e-6)
    bench, _ = settled_bench(dut, 20e3)
    bench.channels[2].scale_v_per_div = 10.0
    assert measured_ratio(bench, 20e3) == pytest.approx(complex(dut.loop_response(20e3)),
                                                        rel=1e-6)


class TestSettling:
    """The transient after a change decays with the DUT's own poles."""

    def test_too_short_settling_gives_a_wrong_point(self):
        dut = load_dut("rational")           # slowest pole 3 kHz: tau = 53 us
        bench, clock = settled_bench(dut, 2e3)
        tau = bench.settling_time_constant_s()
        assert tau == pytest.approx(1 / (2 * np.pi * 3000), rel=1e-9)
        bench.channels[2].scale_v_per_div = 10.0
        f = 12e3
        bench.apply_generator(frequency_hz=f)
        changed_at = clock.now_s
        exact = complex(dut.loop_response(f))
        errors = {}
        # The trigger waits for the next rising crossing, so waits are > 1 period apart.
        for wait_tau in (0, 3, 6, 10, 20):
            clock.now_s = changed_at + wait_tau * tau
            errors[wait_tau] = abs(measured_ratio(bench, f, cycles=2) / exact - 1)
        assert errors[0] > 0.1
        assert errors[0] > errors[3] > errors[6] > errors[10] > errors[20]
        # After 20 time constants (exp(-20) = 2e-9) the point is exact to 1e-6.
        assert errors[20] < 1e-6

    def test_decay_rate_is_the_slowest_pole(self):
        # One generator period apart the trigger sees the same phase, so the error of
        # the fitted point scales by exp(-T / tau) once the faster modes are gone.
        dut = load_dut("rational")
        bench, clock = settled_bench(dut, 5e3)
        bench.channels[2].scale_v_per_div = 10.0
        f = 6e3
        tau = bench.settling_time_constant_s()
        bench.apply_generator(frequency_hz=f)
        exact = complex(dut.loop_response(f))
        clock.advance(1 / f)
        e1 = measured_ratio(bench, f, cycles=1) - exact
        clock.advance(1 / f)
        e2 = measured_ratio(bench, f, cycles=1) - exact
        assert abs(e2 / e1) == pytest.approx(np.exp(-1 / f / tau), rel=1e-4)

    def test_amplitude_change_and_output_on_start_transients(self):
        dut = load_dut("wien", output_limit_v=None)
        clock = FakeClock(100.0)
        bench = SimulatedBench(dut, IDEAL, clock=clock)
        # Output off: no stimulus, nothing on either probe.
        rec = bench.acquire(256, 1e5)
        assert not np.any(rec[1]) and not np.any(rec[2])
        bench.apply_generator(output_on=True, frequency_hz=1e3)
        first = measured_ratio(bench, 1e3, cycles=2)
        assert abs(first / complex(dut.loop_response(1e3)) - 1) > 0.05
        clock.advance(60 * bench.settling_time_constant_s())
        bench.apply_generator(amplitude_vpp=1.0)     # same phase: a step in amplitude
        assert abs(measured_ratio(bench, 1e3, cycles=2)
                   / complex(dut.loop_response(1e3)) - 1) > 0.01


class TestSoftNonlinearity:
    def test_third_harmonic_follows_the_tanh_series(self):
        # tanh(x) = x - x^3/3 + ... and cos^3 = (3 cos + cos 3)/4 (identities): the
        # input-referred 3rd harmonic is -K^2 a^3 / (12 L^2), filtered by H(j 3w)/K*K.
        dut = load_dut("wien")
        f = 500.0
        amplitude_vpp = 0.4
        bench, _ = settled_bench(dut, f, amplitude_vpp=amplitude_vpp)
        bench.channels[2].scale_v_per_div = 10.0
        fs = 64 * f
        rec = bench.acquire(64 * 20, fs)
        third = fit_phasor(rec[2], f, fs, harmonic=3)
        a = amplitude_vpp / 2
        K, L = dut.params.gain, dut.params.output_limit_v
        # The stimulus is a sin x: u - K^2 u^3/(3 L^2) and sin^3 x = (3 sin x - sin 3x)/4
        # give + K^2 a^3/(12 L^2) sin 3x, i.e. the phasor -j K^2 a^3 / (12 L^2).
        series = -1j * K**2 * a**3 / (12 * L**2)
        expected = complex(dut.loop_response(3 * f)) * series
        assert third == pytest.approx(expected, rel=0.02)

    def test_thd_grows_with_drive_and_vanishes_without_a_limit(self):
        f = 500.0
        fs = 64 * f

        def thd(dut, amplitude_vpp):
            bench, _ = settled_bench(dut, f, amplitude_vpp=amplitude_vpp)
            bench.channels[2].scale_v_per_div = 10.0
            rec = bench.acquire(64 * 20, fs)
            h1 = abs(fit_phasor(rec[2], f, fs))
            return np.sqrt(sum(abs(fit_phasor(rec[2], f, fs, k)) ** 2 for k in (2, 3, 4, 5))) / h1

        limited = load_dut("wien")
        assert thd(limited, 0.2) < thd(limited, 1.0) < thd(limited, 3.0)
        assert thd(limited, 3.0) > 0.01
        assert thd(load_dut("wien", output_limit_v=None), 3.0) < 1e-9


class TestImpairments:
    def test_noise_rms_per_channel(self):
        clock = FakeClock(100.0)
        bench = SimulatedBench("wien", Impairments(noise_v_rms=(1e-3, 4e-3), adc_bits=0),
                               seed=3, clock=clock)
        rec = bench.acquire(200_000, 1e6)
        # Standard error of an rms estimate from N normal samples: 1/sqrt(2N) (0.16 %).
        assert np.std(rec[1]) == pytest.approx(1e-3, rel=0.01)
        assert np.std(rec[2]) == pytest.approx(4e-3, rel=0.01)

    @pytest.mark.parametrize("bits", [8, 12])
    def test_quantisation_step(self, bits):
        bench, _ = settled_bench("wien", 1e3, Impairments(adc_bits=bits), amplitude_vpp=0.5)
        scale = 0.1
        bench.channels[1].scale_v_per_div = scale
        rec = bench.acquire(100_000, 10e6)      # dense enough to visit neighbouring codes
        step = 8 * scale / 2**bits
        assert quantisation_step_v(scale, bits) == pytest.approx(step)
        levels = np.unique(rec[1])
        steps = np.diff(levels)
        assert steps.min() == pytest.approx(step, rel=1e-9)
        # Every value sits on the code grid low + k * step.
        k = (rec[1] - (-4 * scale)) / step
        np.testing.assert_allclose(k, np.round(k), atol=1e-6)

    def test_clipping_at_screen_edges(self):
        bench, _ = settled_bench("wien", 1e3, Impairments(adc_bits=8), amplitude_vpp=2.0)
        bench.channels[1].scale_v_per_div = 0.1
        bench.channels[1].offset_v = 0.05
        rec = bench.acquire(4096, 64e3)
        step = 0.8 / 256
        low, high = 0.05 - 0.4, 0.05 + 0.4
        assert rec[1].min() == pytest.approx(low)
        assert rec[1].max() == pytest.approx(high - step)
        assert np.mean(rec[1] >= high - step - 1e-12) > 0.1   # flat tops: clipped

    def test_clock_offset_shifts_fitted_frequency_by_ppm(self):
        ppm = 150.0
        f = 5e3
        bench, _ = settled_bench("wien", f, Impairments(adc_bits=0, clock_offset_ppm=ppm))
        fs = 1e6
        rec = bench.acquire(200_000, fs)
        fitted = fit_frequency(rec[1], f, fs)
        # Scope clock fast by ppm: the tone appears at f / (1 + ppm 1e-6).
        assert fitted == pytest.approx(f / (1 + ppm * 1e-6), rel=1e-9)
        assert bench.acquisition_duration_s(200_000, fs) == pytest.approx(0.2 / (1 + ppm * 1e-6))

    def test_skew_adds_phase_360_f_skew(self):
        skew = 40e-9
        dut = load_dut("wien", output_limit_v=None)
        for f in (1e3, 20e3):
            bench, _ = settled_bench(dut, f, Impairments(adc_bits=0, skew_s=skew))
            bench.channels[2].scale_v_per_div = 10.0
            ratio = measured_ratio(bench, f)
            extra_deg = np.degrees(np.angle(ratio / complex(dut.loop_response(f))))
            assert extra_deg == pytest.approx(360 * f * skew, abs=1e-7)

    def test_dc_offsets_and_ac_coupling(self):
        dut = load_dut("wien", output_limit_v=None)
        bench, _ = settled_bench(dut, 1e3, Impairments(adc_bits=0, dc_offsets_v=(0.01, -0.02)),
                                 offset_v=0.5)
        rec = bench.acquire(6400, 64e3)         # 100 whole cycles
        # Channel 1 sees the generator offset; the Wien network blocks DC (beta(0) = 0).
        assert rec[1].mean() == pytest.approx(0.5 + 0.01, abs=1e-9)
        assert rec[2].mean() == pytest.approx(-0.02, abs=1e-9)
        bench.channels[1].coupling = "AC"
        rec = bench.acquire(6400, 64e3)
        assert rec[1].mean() == pytest.approx(0.01, abs=1e-9)

    def test_trigger_jitter_moves_both_channels_together(self):
        jitter = 2e-6
        f = 10e3
        dut = load_dut("wien", output_limit_v=None)
        bench, _ = settled_bench(dut, f, Impairments(adc_bits=0, trigger_jitter_s=jitter),
                                 seed=7)
        bench.channels[2].scale_v_per_div = 10.0
        fs = 64 * f
        phases, ratios = [], []
        for _ in range(200):
            rec = bench.acquire(640, fs)
            p1 = fit_phasor(rec[1], f, fs)
            phases.append(np.angle(p1))
            ratios.append(fit_phasor(rec[2], f, fs) / p1)
        spread = np.std(np.unwrap(phases))
        # Timing jitter sigma gives phase jitter 2 pi f sigma (definition); 200 draws.
        assert spread == pytest.approx(2 * np.pi * f * jitter, rel=0.15)
        np.testing.assert_allclose(ratios, complex(dut.loop_response(f)), rtol=1e-9)

    def test_probe_attenuation_does_not_change_tip_volts(self):
        bench, _ = settled_bench("wien", 1e3, IDEAL)
        a = bench.acquire(640, 64e3)[1]
        bench.channels[1].probe_attenuation = 10.0
        b = bench.acquire(640, 64e3)[1]
        np.testing.assert_allclose(a, b)


def test_bad_arguments_raise_our_error():
    bench = SimulatedBench("wien", IDEAL, clock=FakeClock(100.0))
    with pytest.raises(InputError):
        bench.apply_generator(frequency=5.0)
    with pytest.raises(InputError, match="only 'sine'"):
        bench.apply_generator(shape="square")
    with pytest.raises(InputError):
        bench.acquire(1, 1e3)
    with pytest.raises(InputError):
        SimulatedBench("wien", Impairments(adc_bits=7))


def test_thread_safe_concurrent_use():
    import threading

    clock = FakeClock(100.0)
    bench = SimulatedBench("wien", IDEAL, clock=clock)
    errors = []

    def work(k):
        try:
            for i in range(20):
                bench.apply_generator(frequency_hz=1e3 + 10 * k + i, output_on=True)
                rec = bench.acquire(128, 64e3)
                assert rec[1].shape == (128,)
        except Exception as exc:
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors


def test_bench_shows_the_injection_error_at_a_bad_point():
    # Middlebrook 1975 (formula re-derived in references.md): what the scope shows at
    # a bad injection point is -T(1 + Z1/Z2) - Z1/Z2, not the loop's own -T.
    bad = load_dut("buck_injection", source_resistance_ohm=2000.0, source_inductance_h=0.0,
                   load_resistance_ohm=5000.0, load_capacitance_f=1e-9)
    good = load_dut("buck_injection")
    for f in (1e3, 10e3, 30e3):
        for dut, must_match_true in ((good, True), (bad, False)):
            bench, _ = settled_bench(dut, f)
            for ch in (1, 2):
                bench.channels[ch].scale_v_per_div = 1e9
            measured = measured_ratio(bench, f)
            z1, z2 = dut.injection_impedances(f)
            t = -complex(dut.true_loop_response(f))
            assert measured == pytest.approx(-t * (1 + z1 / z2) - z1 / z2, rel=1e-6)
            error = abs(measured / -t - 1)
            assert (error < 1e-3) if must_match_true else (error > 0.3)
