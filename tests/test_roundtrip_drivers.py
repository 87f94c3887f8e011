"""Round trips: the shipped drivers against the simulated instruments.

Every shipped dialect is driven through ``open_instrument`` and pyvisa-py over
loopback TCP (the path hardware takes). Without noise and with an ideal converter the
gain measured through the scope equals the bench's exact response to 1e-6 relative,
using a three-parameter least-squares sine fit at the known frequency (IEEE Std 1057
(mem) 4.1.3.1; IEEE Std 1241 (mem) 4.1.4.1).
"""

from __future__ import annotations

import numpy as np
import pytest

from loopwright.errors import DriverError, SCPIError
from loopwright.instruments import ChannelSettings, open_instrument

GENERATORS = ["generator-source-tree", "generator-output-tree"]
SCOPES = ["scope-block", "scope-text"]


def sine_phasor(t_s: np.ndarray, volts: np.ndarray, frequency_hz: float) -> complex:
    """Complex amplitude A exp(j phi) of A cos(wt + phi) + C, three-parameter fit."""
    w = 2 * np.pi * frequency_hz
    design = np.column_stack([np.cos(w * t_s), np.sin(w * t_s), np.ones_like(t_s)])
    (a, b, _), *_ = np.linalg.lstsq(design, volts, rcond=None)
    # a cos + b sin = A cos(wt + phi) with A cos phi = a, A sin phi = -b.
    return complex(a, -b)


@pytest.fixture
def opened():
    """Role objects opened in a test, closed (teardown sequence) at its end."""
    instruments = []
    yield instruments
    for inst in reversed(instruments):
        inst.close()


@pytest.mark.parametrize("dialect", GENERATORS)
def test_generator_round_trip(start_sim_bench, opened, dialect):
    server = start_sim_bench(generator=dialect)
    gen = open_instrument(server.resources["generator"], "generator", timeout_s=3.0)
    opened.append(gen)
    assert f"simulated generator ({dialect})" in gen.identity
    assert gen.driver_name == dialect
    gen.set_sine(12345.678, 0.75, 0.125)
    gen.set_output(True)
    settings = gen.read_settings()
    assert (settings.frequency_hz, settings.amplitude_vpp) == (12345.678, 0.75)
    assert (settings.offset_v, settings.output_on) == (0.125, True)
    state = server.bench.generator
    assert (state.frequency_hz, state.amplitude_vpp, state.offset_v) == (12345.678, 0.75, 0.125)
    assert state.output_on is True


@pytest.mark.parametrize("dialect", GENERATORS)
def test_a_refusal_of_the_instrument_reaches_the_driver_as_scpi_error(
    start_sim_bench, opened, dialect
):
    server = start_sim_bench(generator=dialect)
    server.instruments["generator"].faults.refuse_amplitude_above(0.5)
    gen = open_instrument(server.resources["generator"], "generator", timeout_s=3.0)
    opened.append(gen)
    gen.set_amplitude(0.4)
    with pytest.raises(SCPIError) as err:
        gen.set_amplitude(0.6)
    assert err.value.code == -222
    assert server.bench.generator.amplitude_vpp == 0.4


def test_driver_limits_match_the_simulated_limits(start_sim_bench, opened):
    server = start_sim_bench()
    gen = open_instrument(server.resources["generator"], "generator", timeout_s=3.0)
    opened.append(gen)
    sim = server.instruments["generator"]
    assert gen.max_frequency_hz == sim.max_frequency_hz
    assert gen.max_amplitude_vpp == sim.max_amplitude_vpp
    with pytest.raises(DriverError):
        gen.set_frequency(sim.max_frequency_hz * 1.01)  # refused before sending


@pytest.mark.parametrize(
    ("generator", "scope"), [(GENERATORS[0], SCOPES[0]), (GENERATORS[1], SCOPES[1])]
)
def test_gain_through_the_scope_equals_the_exact_response(
    start_sim_bench, opened, fake_clock, generator, scope
):
    server = start_sim_bench(
        "rational", generator=generator, scope=scope, adc_bits=0, clock=fake_clock
    )
    bench = server.bench
    frequency_hz = 1171.13  # 853.87 samples per cycle: quantisation errors do not repeat
    gen = open_instrument(server.resources["generator"], "generator", timeout_s=3.0)
    opened.append(gen)
    sc = open_instrument(server.resources["scope"], "scope", timeout_s=5.0)
    opened.append(sc)
    assert sc.driver_name == scope
    gen.set_sine(frequency_hz, 1.0)
    gen.set_output(True)
    fake_clock.advance(1.0)  # thousands of the DUT's time constants: settled
    h_exact = complex(bench.exact_response(np.array([frequency_hz]))[0])
    peaks = {1: 0.5, 2: 0.5 * abs(h_exact)}
    for channel, peak_v in peaks.items():
        sc.set_channel(channel, ChannelSettings(scale_v_per_div=peak_v / 3.5))
    actual_hz = sc.set_timebase(100_000, 1e6)
    assert actual_hz == 1e6  # 1 GS/s / 1000 and 500 MS/s / 500
    sc.set_trigger(1, 0.0, "rise")
    capture = sc.acquire([1, 2], timeout_s=5.0)
    assert capture.sample_rate_hz == pytest.approx(1e6, rel=1e-12)
    t_s = capture.time_s()
    reference = sine_phasor(t_s, capture.volts[1], frequency_hz)
    response = sine_phasor(t_s, capture.volts[2], frequency_hz)
    assert abs(reference) == pytest.approx(0.5, rel=1e-6)
    h_measured = response / reference
    # What is left (measured: ~3e-7 block, ~4e-11 text) is the int16 transport's
    # quantisation of an undithered sine, part of which falls on the fundamental.
    assert abs(h_measured - h_exact) / abs(h_exact) < 1e-6


def test_capture_volts_equal_the_bench_record(start_sim_bench, opened):
    server = start_sim_bench(adc_bits=12)
    gen = open_instrument(server.resources["generator"], "generator", timeout_s=3.0)
    sc = open_instrument(server.resources["scope"], "scope", timeout_s=5.0)
    opened += [gen, sc]
    gen.set_sine(50_000.0, 2.0)
    gen.set_output(True)
    sc.set_channel(1, ChannelSettings(scale_v_per_div=0.2, offset_v=0.1))
    sc.set_timebase(5000, 2.5e8)
    capture = sc.acquire([1, 2])
    record = server.instruments["scope"].record
    top_v = 0.1 + 4 * 0.2  # 1 V peak clips at the top of a 0.2 V/div screen
    step_v = 8 * 0.2 / 2**12
    inside = record.volts[1] < top_v - 1.5 * step_v
    assert 0 < inside.sum() < inside.size
    np.testing.assert_allclose(capture.volts[1][inside], record.volts[1][inside], atol=1e-12)
    # Clipped samples come as code 32767: the screen top less one int16 step.
    np.testing.assert_allclose(capture.volts[1][~inside], top_v - 8 * 0.2 / 65536)
    assert capture.adc_clipped[1] is True
    assert capture.sample_rate_hz == pytest.approx(2.5e8)


def test_relay_round_trip(sim_bench, opened):
    relay = open_instrument(sim_bench.resources["switch"], "switch", timeout_s=3.0)
    opened.append(relay)
    assert relay.driver_name == "switch-relay"
    relay.set_closed(True)
    assert sim_bench.bench.loop_closed is True
    assert relay.read_closed() is True
    relay.set_closed(False)
    assert sim_bench.bench.loop_closed is False


@pytest.mark.parametrize("scope", SCOPES)
def test_drivers_work_through_the_in_process_backend(start_inprocess_bench, opened, scope):
    handle = start_inprocess_bench(scope=scope, adc_bits=0)
    gen = open_instrument(handle.resources["generator"], "generator", backend=handle.backend)
    sc = open_instrument(handle.resources["scope"], "scope", backend=handle.backend)
    opened += [gen, sc]
    gen.set_sine(2000.0, 0.5)
    gen.set_output(True)
    assert sc.set_timebase(1000, 1e6) == 1e6
    capture = sc.acquire([1, 2])
    assert capture.record_length == 1000
    record = handle.instruments["scope"].record
    # within half an int16 step of the default 1 V/div screen (text: 8 digits)
    np.testing.assert_allclose(capture.volts[2], record.volts[2], rtol=1e-7, atol=4 / 65536)
    assert handle.bench.generator.frequency_hz == 2000.0


@pytest.mark.parametrize("big_endian", [False, True])
def test_raw_pyvisa_block_read_both_byte_orders(sim_bench, open_sim, big_endian):
    scope = open_sim(sim_bench.resources["scope"])
    scope.write("SOUR1:FREQ 1e5")  # a generator command: the scope refuses it
    assert scope.query("SYST:ERR?").startswith("-113,")
    scope.write(f"TIM:POIN 3001;:WAV:ORD {'MSBF' if big_endian else 'LSBF'};:ACQ:SING")
    assert scope.query("*OPC?") == "1"
    data = scope.query_binary_values(
        "WAV:DATA?", datatype="h", is_big_endian=big_endian, container=np.array
    )
    model = sim_bench.instruments["scope"]
    np.testing.assert_array_equal(data.astype(np.int16), model.codes(model.record, 1))


def test_a_point_taken_before_settling_is_measurably_wrong(start_sim_bench, opened, fake_clock):
    # The generator front end starts the bench's settling transient at each change, so
    # a runner that waits too little sees it through the scope (practice).
    server = start_sim_bench("rational", adc_bits=0, clock=fake_clock)
    gen = open_instrument(server.resources["generator"], "generator", timeout_s=3.0)
    sc = open_instrument(server.resources["scope"], "scope", timeout_s=5.0)
    opened += [gen, sc]
    for channel in (1, 2):
        sc.set_channel(channel, ChannelSettings(scale_v_per_div=1.0))
    sc.set_timebase(2000, 1e7)  # 0.2 ms: a few of the DUT's time constants
    gen.set_sine(10_000.0, 1.0)
    gen.set_output(True)

    def gain_error(frequency_hz: float) -> float:
        capture = sc.acquire([1, 2])
        t_s = capture.time_s()
        h = sine_phasor(t_s, capture.volts[2], frequency_hz) / sine_phasor(
            t_s, capture.volts[1], frequency_hz
        )
        exact = complex(server.bench.exact_response(np.array([frequency_hz]))[0])
        return abs(h - exact) / abs(exact)

    fake_clock.advance(1.0)
    assert gain_error(10_000.0) < 1e-5
    gen.set_frequency(12_000.0)
    assert gain_error(12_000.0) > 1e-3  # at once: the transient is in the record
    fake_clock.advance(1.0)
    assert gain_error(12_000.0) < 1e-5
