"""Speed of the simulated bench's physics (open-loop records and closed-loop runs).

Run: python benchmarks/sim_physics_speed.py
Prints seconds per open-loop record for each DUT model and integration steps per
second of the closed-loop oscillators. The DUT values are the models' invented defaults.
"""

from __future__ import annotations

import time

from mock_instruments.bench import Impairments, SimulatedBench
from mock_instruments.duts import load_dut

MODELS = ("rational", "lc_oscillator", "wien", "phase_shift", "buck_injection",
          "opamp_capload")


class _Clock:
    def __init__(self) -> None:
        self.t_s = 10.0

    def __call__(self) -> float:
        return self.t_s


def open_loop(name: str, record_length: int = 1_000_000) -> float:
    clock = _Clock()
    bench = SimulatedBench(load_dut(name), Impairments(noise_v_rms=(1e-3, 1e-3)),
                           seed=1, clock=clock)
    bench.apply_generator(frequency_hz=2e3, output_on=True)
    clock.t_s += 1e-4                      # still settling: the transient is computed too
    started = time.perf_counter()
    bench.acquire(record_length, 1e7)
    return time.perf_counter() - started


def closed_loop(name: str, cycles: float = 500.0) -> float:
    dut = load_dut(name)
    clock = _Clock()
    bench = SimulatedBench(dut, Impairments(adc_bits=0), seed=1, clock=clock)
    bench.set_loop_closed(True)
    run = bench._closed_run
    steps = int(cycles / dut.resonance_hz() / run.step_s)
    started = time.perf_counter()
    clock.t_s += cycles / dut.resonance_hz()
    bench.acquire(2, 1e9)
    return steps / (time.perf_counter() - started)


def main() -> None:
    for name in MODELS:
        print(f"open loop  {name:16s} 1e6-sample record: {open_loop(name):.3f} s")
    for name in ("lc_oscillator", "wien", "phase_shift"):
        print(f"closed loop {name:15s} {closed_loop(name):,.0f} steps/s (64 steps/period)")


if __name__ == "__main__":
    main()
