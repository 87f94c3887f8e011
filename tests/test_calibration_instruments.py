"""The pieces under the channel calibration: the probe relay's SCPI, its driver, and
the simulated bench's channel-2 mismatch and joined probes.

Driver tests assert the exact SCPI strings sent (practice: a driver test pins the
command text), read from the traffic log of a real pyvisa-py session to the served
relay box. Physics checks compare the records' ratio with closed forms (a first-order
low-pass and a pure delay, textbook).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from loopwright.dsp import estimate_point
from loopwright.errors import DriverError, InputError
from loopwright.instruments import open_instrument
from loopwright.instruments.driver import load_driver
from loopwright.instruments.roles import LoopSwitch, ProbeSwitch
from loopwright.instruments.session import TrafficLog
from mock_instruments.bench import Impairments, SimulatedBench
from mock_instruments.instruments import make_instrument

SHIPPED_RELAY = Path(__file__).resolve().parents[1] / "drivers" / "switch-relay.yaml"


def _writes(log_path: Path) -> list[str]:
    lines = [line.split("\t") for line in log_path.read_text().splitlines()]
    return [fields[3] for fields in lines if fields[2] == "write"]


# ------------------------------------------------------------------ driver and relay


def test_probe_relay_exact_commands(tmp_path, start_sim_bench) -> None:
    server = start_sim_bench("rational")
    log_path = tmp_path / "traffic.log"
    log = TrafficLog(log_path)
    switch = open_instrument(server.resources["switch"], "switch", timeout_s=3.0,
                             traffic_log=log)
    try:
        assert isinstance(switch, LoopSwitch) and isinstance(switch, ProbeSwitch)
        assert switch.can_join_probes
        mark = len(_writes(log_path))
        switch.set_probes_joined(True)
        assert server.bench.probes_joined is True
        assert server.bench.loop_closed is False         # relay 2 leaves the loop alone
        assert switch.read_probes_joined() is True
        switch.set_probes_joined(False)
        assert switch.read_probes_joined() is False
        assert _writes(log_path)[mark:] == [
            "ROUT:CLOS 2", "SYST:ERR?", "ROUT:STAT? 2",
            "ROUT:OPEN 2", "SYST:ERR?", "ROUT:STAT? 2"]
        with pytest.raises(DriverError):
            switch.set_probes_joined("1;*RST")
        switch.set_probes_joined(True)
        mark = len(_writes(log_path))
        switch.close()                                   # teardown: loop open, probes apart
        assert _writes(log_path)[mark:] == ["ROUT:OPEN 1", "SYST:ERR?",
                                            "ROUT:OPEN 2", "SYST:ERR?"]
        assert server.bench.probes_joined is False
    finally:
        switch.close()
        log.close()


def test_relay_box_relay_two_and_reset() -> None:
    bench = SimulatedBench("rational", Impairments(), seed=0)
    relay = make_instrument("switch-relay", bench)
    relay.handle("ROUT:CLOS (@2)")
    assert bench.probes_joined is True and bench.loop_closed is False
    assert relay.query("ROUT:STAT? 2") == "1"
    assert relay.query("ROUT:STAT? 1") == "0"
    assert relay.closings == {1: 0, 2: 1}
    relay.handle("*RST")
    assert bench.probes_joined is False
    relay.handle("ROUT:OPEN 3")
    assert relay.query("SYST:ERR?").startswith("-222,")


def _driver_without_probes(tmp_path: Path, extra: str = "") -> Path:
    text = SHIPPED_RELAY.read_text()
    kept = [line for line in text.splitlines()
            if "join_probes" not in line and "separate_probes" not in line
            and "probes_joined" not in line]
    path = tmp_path / "relay-loop-only.yaml"
    path.write_text("\n".join(kept).replace("name: switch-relay", "name: relay-loop-only")
                    + "\n" + extra)
    return path


def test_switch_without_probe_commands_refuses_before_sending(tmp_path, start_sim_bench
                                                               ) -> None:
    server = start_sim_bench("rational")
    log_path = tmp_path / "traffic.log"
    driver = _driver_without_probes(tmp_path)
    with open_instrument(server.resources["switch"], "switch", driver=driver,
                         timeout_s=3.0, traffic_log=log_path) as switch:
        assert not switch.can_join_probes
        mark = len(_writes(log_path))
        with pytest.raises(DriverError, match="cannot join the probes"):
            switch.set_probes_joined(True)
        assert _writes(log_path)[mark:] == []
        with pytest.raises(DriverError, match="probes_joined"):
            switch.read_probes_joined()


def test_probe_commands_go_in_pairs(tmp_path) -> None:
    text = SHIPPED_RELAY.read_text().replace("  separate_probes: 'ROUT:OPEN 2'\n", "")
    path = tmp_path / "half.yaml"
    path.write_text(text)
    with pytest.raises(InputError, match=r"half\.yaml:\d+: commands.*go together"):
        load_driver(path)


def test_probe_commands_take_no_placeholders(tmp_path) -> None:
    text = SHIPPED_RELAY.read_text().replace("'ROUT:CLOS 2'", "'ROUT:CLOS {channel}'")
    path = tmp_path / "placeholder.yaml"
    path.write_text(text)
    with pytest.raises(InputError, match=r"placeholder\.yaml:\d+: commands\.join_probes"):
        load_driver(path)


# ------------------------------------------------------------------ physics


class _Clock:
    def __init__(self) -> None:
        self.now_s = 100.0

    def __call__(self) -> float:
        return self.now_s


def _ratio(bench: SimulatedBench, clock: _Clock, frequency_hz: float) -> complex:
    bench.apply_generator(frequency_hz=frequency_hz, amplitude_vpp=0.5, output_on=True)
    clock.now_s += 2.0   # settled: far beyond every time constant
    rate_hz = 256 * frequency_hz
    record = bench.acquire(4096, rate_hz)
    return estimate_point(record[1], record[2], rate_hz, frequency_hz).gain


@pytest.mark.parametrize("coupling", ["DC", "AC"])
def test_joined_probes_show_the_mismatch_alone(coupling) -> None:
    """Joined: channel 2 / channel 1 = (1 + g) e^{-j w d} / (1 + j f / f_p); apart:
    the DUT's H times that (closed forms, textbook)."""
    clock = _Clock()
    imp = Impairments(adc_bits=0, channel2_gain_error=-0.02, channel2_delay_s=1e-6,
                      channel2_pole_hz=25e3)
    bench = SimulatedBench("rational", imp, seed=0, clock=clock)
    for state in bench.channels.values():
        state.scale_v_per_div = 1.0
        state.coupling = coupling
    bench.apply_generator(offset_v=0.1)   # a DC level AC coupling must take away
    for frequency_hz in (50.0, 3e3, 25e3):
        closed_form = (0.98 * np.exp(-2j * np.pi * frequency_hz * 1e-6)
                       / (1 + 1j * frequency_hz / 25e3))
        bench.set_probes_joined(True)
        joined = _ratio(bench, clock, frequency_hz)
        bench.set_probes_joined(False)
        apart = _ratio(bench, clock, frequency_hz)
        assert abs(joined / closed_form - 1) < 1e-8
        assert abs(apart / (closed_form * bench.exact_response(frequency_hz)) - 1) < 1e-8


def test_no_mismatch_by_default() -> None:
    clock = _Clock()
    bench = SimulatedBench("rational", Impairments(adc_bits=0), seed=0, clock=clock)
    assert bench.channel2_mismatch(1e3) == 1.0
    bench.set_probes_joined(True)
    assert abs(_ratio(bench, clock, 1e3) - 1.0) < 1e-9


def test_closed_loop_channel2_gain_and_delay() -> None:
    """With the loop closed both probes see the loop node; channel 2 scaled by 1 + g
    and late by d (the probe pole is not applied to the closed loop, as documented)."""
    clock = _Clock()
    imp = Impairments(adc_bits=0, channel2_gain_error=0.1, channel2_delay_s=2e-6)
    bench = SimulatedBench("lc_oscillator", imp, seed=3, clock=clock)
    for state in bench.channels.values():
        state.scale_v_per_div = 5.0
    bench.set_loop_closed(True)
    clock.now_s += 0.05
    rate_hz = 50e6
    record = bench.acquire(20000, rate_hz)
    v1, v2 = record[1], record[2]
    lag = round(2e-6 * rate_hz)
    peak_v = float(np.max(np.abs(v1)))
    assert peak_v > 0.1  # oscillating
    # the closed loop is integrated on a grid and interpolated (cubic Hermite) between
    # steps: samples 2 us apart agree to ~1e-7 of the peak, not to the last bit
    np.testing.assert_allclose(v2[lag:], 1.1 * v1[:-lag], rtol=0, atol=1e-6 * peak_v)


@pytest.mark.parametrize(("field", "value"), [("channel2_gain_error", -1.0),
                                              ("channel2_delay_s", -1e-9),
                                              ("channel2_pole_hz", 0.0)])
def test_bad_mismatch_refused(field, value) -> None:
    with pytest.raises(InputError, match=field):
        SimulatedBench("rational", Impairments(**{field: value}), seed=0)
