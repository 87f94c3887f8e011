"""Closed loop: the oscillator models oscillate by time integration of their ODEs.

Frequencies are checked against the textbook formulas: Colpitts
f0 = 1/(2 pi sqrt(L C1 C2/(C1+C2))), Wien f0 = 1/(2 pi R C), RC low-pass ladder
f = sqrt(6)/(2 pi R C) (Sedra & Smith ch. 18 (mem)). Frequency and amplitude come
from a 4-parameter sine fit (IEEE Std 1057).
"""

from __future__ import annotations

import time

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from fake_clock import FakeClock
from mock_instruments.bench import Impairments, SimulatedBench
from mock_instruments.duts import load_dut

IDEAL = Impairments(adc_bits=0)
POINTS_PER_CYCLE = 40


def sine_fit(volts: np.ndarray, guess_hz: float, sample_rate_hz: float) -> tuple[float, float]:
    """4-parameter sine fit (IEEE 1057): frequency and amplitude of the fundamental."""
    t = np.arange(volts.size) / sample_rate_hz
    f = guess_hz
    for _ in range(10):
        w = 2 * np.pi * f
        basis = np.column_stack([np.cos(w * t), np.sin(w * t), np.ones_like(t)])
        a, b, c = np.linalg.lstsq(basis, volts, rcond=None)[0]
        dw = (-a * np.sin(w * t) + b * np.cos(w * t)) * t
        step = np.linalg.lstsq(np.column_stack([basis, dw]), volts - basis @ [a, b, c],
                               rcond=None)[0]
        f += step[3] / (2 * np.pi)
    return f, float(np.hypot(a, b))


def coarse_frequency(volts: np.ndarray, sample_rate_hz: float) -> float:
    """FFT peak, to start the fit."""
    spectrum = np.abs(np.fft.rfft((volts - volts.mean()) * np.hanning(volts.size)))
    return np.argmax(spectrum) * sample_rate_hz / volts.size


def run_closed(dut, warm_cycles=300.0, seed=2):
    f0 = dut.resonance_hz()
    clock = FakeClock(5000.0)
    bench = SimulatedBench(dut, IDEAL, seed=seed, clock=clock)
    bench.set_loop_closed(True)
    return bench, clock, f0


def measure(bench, f0, cycles=60):
    fs = POINTS_PER_CYCLE * f0
    rec = bench.acquire(int(cycles * POINTS_PER_CYCLE), fs)
    f, amplitude = sine_fit(rec[2], coarse_frequency(rec[2], fs), fs)
    return f, amplitude, rec


@pytest.mark.parametrize(("name", "overrides"), [
    ("lc_oscillator", {}),
    ("lc_oscillator", {"inductance_h": 10e-6, "c1_f": 1e-9, "c2_f": 4e-9,   # references.md
                       "transconductance_s": 10e-3}),
    ("wien", {}),
    ("phase_shift", {}),
])
def test_oscillates_at_textbook_frequency_with_steady_amplitude(name, overrides):
    dut = load_dut(name, **overrides)
    bench, clock, f0 = run_closed(dut)
    # Start-up from noise: just after closing there is almost nothing.
    _, start_amplitude, _ = measure(bench, f0, cycles=5)
    clock.advance(300 / f0)
    f_a, amp_a, rec = measure(bench, f0)
    clock.advance(200 / f0)
    f_b, amp_b, _ = measure(bench, f0)
    assert start_amplitude < 1e-2 * amp_b
    assert f_a == pytest.approx(f0, rel=0.02)
    assert f_b == pytest.approx(f0, rel=0.02)
    # The amplitude has settled and stays: two later windows agree within 2 %.
    assert amp_b == pytest.approx(amp_a, rel=0.02)
    # Both probes sit on the same node once the loop is closed.
    np.testing.assert_allclose(rec[1], rec[2])


def test_amplitude_is_set_by_the_saturation():
    # w = L tanh(K v / L) scales exactly with L: twice the limit, twice the amplitude.
    amplitudes = []
    for limit in (2.0, 4.0):
        bench, clock, f0 = run_closed(load_dut("wien", output_limit_v=limit))
        clock.advance(400 / f0)
        amplitudes.append(measure(bench, f0)[1])
    assert amplitudes[1] / amplitudes[0] == pytest.approx(2.0, rel=0.01)


def test_more_gain_more_amplitude_and_distortion():
    results = []
    for gain in (3.15, 4.0):
        bench, clock, f0 = run_closed(load_dut("wien", gain=gain))
        clock.advance(400 / f0)
        f, amplitude, rec = measure(bench, f0)
        fs = POINTS_PER_CYCLE * f0
        t = np.arange(rec[2].size) / fs
        basis = np.column_stack([np.cos(2 * np.pi * k * f * t) for k in (1, 3)]
                                + [np.sin(2 * np.pi * k * f * t) for k in (1, 3)])
        c = np.linalg.lstsq(basis, rec[2], rcond=None)[0]
        results.append((amplitude, np.hypot(c[1], c[3]) / np.hypot(c[0], c[2])))
    assert results[1][0] > results[0][0]
    assert results[1][1] > 3 * results[0][1]


def test_stable_loop_closed_decays():
    dut = load_dut("rational")          # H(0) = -5, a stable negative-feedback loop
    clock = FakeClock(5000.0)
    bench = SimulatedBench(dut, IDEAL, seed=1, clock=clock)
    bench.set_loop_closed(True)
    first = np.max(np.abs(bench.acquire(200, 1e6)[2]))
    clock.advance(0.01)
    later = np.max(np.abs(bench.acquire(200, 1e6)[2]))
    assert first > 0
    assert later < 1e-6 * first


def test_state_continues_between_records_and_long_gaps_stay_cheap():
    dut = load_dut("wien")
    bench, clock, f0 = run_closed(dut)
    clock.advance(400 / f0)
    _, amp_a, _ = measure(bench, f0)
    # A record taken right after the previous one continues it seamlessly.
    fs = POINTS_PER_CYCLE * f0
    a = bench.acquire(400, fs)[2]
    b = bench.acquire(400, fs)[2]
    joined = np.concatenate([a, b])
    _, amp_joined = sine_fit(joined, f0, fs)
    assert amp_joined == pytest.approx(amp_a, rel=0.02)
    # An hour on the bench clock is not integrated in full (bounded catch-up).
    clock.advance(3600.0)
    started = time.perf_counter()
    _, amp_late, _ = measure(bench, f0)
    assert time.perf_counter() - started < 5.0
    assert amp_late == pytest.approx(amp_a, rel=0.02)


def test_reopening_the_loop_restores_the_open_loop_measurement():
    dut = load_dut("wien", output_limit_v=None)
    clock = FakeClock(5000.0)
    bench = SimulatedBench(dut, IDEAL, seed=1, clock=clock)
    bench.apply_generator(frequency_hz=1e3, output_on=True)
    bench.set_loop_closed(True)
    clock.advance(0.01)
    bench.acquire(400, 40e3)
    bench.set_loop_closed(False)
    clock.advance(60 * bench.settling_time_constant_s())
    rec = bench.acquire(4000, 40e3)
    t = np.arange(4000) / 40e3
    basis = np.column_stack([np.cos(2 * np.pi * 1e3 * t), np.sin(2 * np.pi * 1e3 * t),
                             np.ones_like(t)])
    p = [complex(*(np.linalg.lstsq(basis, rec[k], rcond=None)[0][:2] * [1, -1])) for k in (1, 2)]
    assert p[1] / p[0] == pytest.approx(complex(dut.loop_response(1e3)), rel=1e-6)


@pytest.mark.parametrize("name", ["wien", "lc_oscillator"])
def test_integrator_agrees_with_scipy_dop853(name):
    # Reference: scipy.integrate.solve_ivp (DOP853, rtol 1e-11) on the same ODE from the
    # same state: frequency within 1e-4 and amplitude within 1e-3.
    dut = load_dut(name)
    bench, clock, f0 = run_closed(dut)
    clock.advance(300 / f0)
    bench.acquire(POINTS_PER_CYCLE, POINTS_PER_CYCLE * f0)
    system = dut.loop_system()
    net = system.network
    run_state = bench._closed_run
    x0, t0 = run_state.x.copy(), run_state.t_s
    clock.now_s = t0
    fs = POINTS_PER_CYCLE * f0
    t = np.arange(40 * POINTS_PER_CYCLE) / fs
    solution = solve_ivp(lambda _t, x: net.A @ x + net.B * system.stage(net.C @ x),
                         (0.0, t[-1]), x0, method="DOP853", rtol=1e-11, atol=1e-15, t_eval=t)
    reference = net.C @ solution.y
    ours = bench.acquire(t.size, fs)[2]
    f_ref, a_ref = sine_fit(reference, f0, fs)
    f_ours, a_ours = sine_fit(ours, f0, fs)
    assert f_ours == pytest.approx(f_ref, rel=1e-4)
    assert a_ours == pytest.approx(a_ref, rel=1e-3)


@pytest.mark.parametrize("name", ["buck_injection", "opamp_capload", "rational"])
def test_stable_linear_loops_close_exactly_and_settle(name):
    # Stable linear loops are solved with the closed loop's matrix exponential: the
    # start-up noise decays with the closed-loop poles, however stiff the loop is.
    dut = load_dut(name)
    clock = FakeClock(5000.0)
    bench = SimulatedBench(dut, IDEAL, seed=4, clock=clock)
    bench.set_loop_closed(True)
    assert bench._closed_run.exact
    started = time.perf_counter()
    first = np.max(np.abs(bench.acquire(1000, 1e6)[2]))
    clock.advance(1.0)
    later = np.max(np.abs(bench.acquire(1000, 1e6)[2]))
    assert time.perf_counter() - started < 2.0
    assert first > 0 and later < 1e-9 * first


def test_unstable_linear_loop_meets_the_rail():
    # A linear loop with |H| > 1 at 0 degrees has nothing to hold it but the rail.
    dut = load_dut("wien", output_limit_v=None)
    bench, clock, f0 = run_closed(dut)
    assert not bench._closed_run.exact
    clock.advance(300 / f0)
    _, amplitude, _ = measure(bench, f0)
    beta = 1 / 3                      # Wien network at f0: the rail seen through it
    assert 0.5 * 15.0 * beta < amplitude < 1.3 * 15.0 * beta


def test_consecutive_records_continue_one_trajectory():
    # Two back-to-back records equal one record twice as long taken by an identical
    # bench (same seed, same clock): the loop's state carries over between records.
    # The clock starts at 0 so that float time resolution (1e-12 s at 5000 s) does not
    # blur the comparison at 1.5 MHz.
    dut = load_dut("lc_oscillator")
    f0 = dut.resonance_hz()
    fs = POINTS_PER_CYCLE * f0 * 1.37          # not a multiple of the step rate
    n = 1500
    joined = []
    whole = None
    for split in (True, False):
        clock = FakeClock(0.0)
        bench = SimulatedBench(dut, IDEAL, seed=9, clock=clock)
        bench.set_loop_closed(True)
        clock.advance(250 / f0)
        if split:
            start = clock.now_s
            joined.append(bench.acquire(n, fs)[2])
            clock.now_s = start + n / fs
            joined.append(bench.acquire(n, fs)[2])
        else:
            whole = bench.acquire(2 * n, fs)[2]
    amplitude = np.max(np.abs(whole))
    np.testing.assert_allclose(np.concatenate(joined), whole, atol=1e-9 * amplitude)
