"""Sweep overhead, the demo's wall time, and adaptive vs uniform plans.

1. Overhead: the simulated bench in real-time mode (acquisitions take their record
   time) with a modelled query turnaround per reply, reached through pyvisa-py over
   loopback TCP. Overhead = wall time of the sweep / (sum over points of the settling
   wait and the record durations actually acquired). Target: <= 1.15.
2. The demo (``loopwright demo``) wall time.
3. Adaptive refinement vs uniform plans: points and phase-margin error against the
   model's exact value (fast mode, no noise): one point per decade plus up to 4 points
   at the crossings, against uniform plans of 1 to 8 points per decade.

Run: ``python benchmarks/bench_sweep.py [--latency-ms 1] [--skip-demo]``
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from loopwright.analysis import FrequencyResponse, analyze_loop
from loopwright.procedure import frequency_plan, load_procedure, settle_time_s
from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.store import load_run
from mock_instruments.bench import Impairments, SimulatedBench
from mock_instruments.duts import load_dut
from mock_instruments.server import serve_bench


def serve(realtime: bool, latency_s: float, noise_v_rms: float = 1e-4):
    bench = SimulatedBench(load_dut("rational"),
                           Impairments(noise_v_rms=(noise_v_rms, noise_v_rms)), seed=2)
    server = serve_bench(bench, {"generator": "generator-source-tree", "scope": "scope-block"},
                         realtime=realtime)
    for instrument in server.instruments.values():
        instrument.query_latency_s = latency_s
    return server


def bench_file(work: Path, server) -> Path:
    path = work / "bench.yaml"
    path.write_text(
        f"generator:\n  resource: '{server.resources['generator']}'\n"
        f"scope:\n  resource: '{server.resources['scope']}'\n"
        "timeout_s: 5.0\nmax_amplitude_vpp: 1.0\nmax_frequency_hz: 1.0e6\n")
    return path


def overhead(work: Path, latency_s: float) -> None:
    server = serve(realtime=True, latency_s=latency_s)
    procedure = work / "overhead.yaml"
    procedure.write_text(
        "name: overhead\nsign: 1\nmethod: broken_loop\nsteps:\n  - kind: sweep\n"
        "    start_hz: 20\n    stop_hz: 2000\n    points_per_decade: 15\n"
        "    amplitude_vpp: 0.2\n    settle_s: 0\n    settle_cycles: 10\n"
        "    cycles_per_record: 10\n    min_samples: 2000\n")
    started = time.perf_counter()
    outcome = run_procedure(procedure, bench_file(work, server),
                            RunOptions(out_dir=work / "runs", quiet=True, assume_yes=True,
                                       render_report=False))
    wall_s = time.perf_counter() - started
    server.close()
    points = load_run(outcome.run_dir).points
    step = load_procedure(procedure).steps[0]
    plan = frequency_plan(step)
    settle = sum(settle_time_s(step, f) for f in plan)
    records = float(np.sum(points["record_length"] / points["sample_rate_hz"]
                           * points["averages"]))
    acquisitions = _acquisitions(outcome.run_dir)
    record_per_acq = records / max(1, len(points))
    physical = settle + record_per_acq * acquisitions
    # the sweep alone: from the first point on disk to the last, against the physical
    # time of points 2..N (start-up, file checks and connecting are left out)
    stamps = pd.to_datetime(points["timestamp_utc"])
    sweep_s = (stamps.iloc[-1] - stamps.iloc[0]).total_seconds()
    later = points.iloc[1:]
    later_physical = float(sum(settle_time_s(step, f) for f in later["frequency_hz"])
                           + np.sum(later["record_length"] / later["sample_rate_hz"]
                                    * later["averages"]))
    print(f"overhead: {len(points)} points, {acquisitions} acquisitions"
          f" (autorange included), query latency {1e3 * latency_s:g} ms")
    print(f"  wall {wall_s:.2f} s; settling {settle:.2f} s + records"
          f" {record_per_acq * acquisitions:.2f} s = {physical:.2f} s;"
          f" ratio {wall_s / physical:.3f} with start-up")
    print(f"  sweep alone (points 2..N): {sweep_s:.2f} s for {later_physical:.2f} s of"
          f" settling and records; ratio {sweep_s / later_physical:.3f} (target <= 1.15)")


def _acquisitions(run_dir: Path) -> int:
    """Acquisitions started, counted in the SCPI traffic log."""
    text = (run_dir / "traffic.log").read_text()
    return sum(1 for line in text.splitlines() if "ACQ:SING" in line and "->" in line) or \
        text.count("ACQ:SING")


def demo_time(work: Path) -> None:
    started = time.perf_counter()
    subprocess.run([sys.executable, "-m", "loopwright", "demo", "--out", str(work / "demo"),
                    "--quiet"], check=True, capture_output=True)
    print(f"demo: {time.perf_counter() - started:.1f} s wall (process start to exit)")


def adaptive_vs_uniform(work: Path) -> None:
    dut = load_dut("rational")
    f_dense = np.geomspace(100, 1e5, 20000)
    exact = analyze_loop(FrequencyResponse(f_dense, dut.loop_response(f_dense))).to_dict()
    server = serve(realtime=False, latency_s=0.0, noise_v_rms=0.0)
    bench = bench_file(work, server)

    def sweep(name: str, ppd: float, refine: bool) -> tuple[int, float]:
        procedure = work / f"{name}.yaml"
        text = ("name: plan\nsign: 1\nmethod: broken_loop\nsteps:\n  - kind: sweep\n"
                f"    start_hz: 100\n    stop_hz: 100000\n    points_per_decade: {ppd}\n"
                "    amplitude_vpp: 0.2\n    settle_s: 0\n    settle_cycles: 0\n"
                "    cycles_per_record: 10\n    min_samples: 2000\n")
        if refine:
            text += ("    refine:\n      max_extra_points: 4\n      max_phase_step_deg: 60\n"
                     "      max_gain_step_db: 30\n      near_crossings: true\n")
        procedure.write_text(text)
        outcome = run_procedure(procedure, bench,
                                RunOptions(out_dir=work / name, quiet=True, assume_yes=True,
                                           render_report=False))
        figures = outcome.summary["analysis"]
        return outcome.summary["points"], abs(figures["phase_margin_deg"]
                                              - exact["phase_margin_deg"])

    refined_points, refined_err = sweep("adaptive", 1, True)
    print(f"adaptive (1 per decade + up to 4 points at the crossings): {refined_points}"
          f" points, phase margin error {refined_err:.4f} deg")
    for ppd in (1, 1.5, 2, 2.5, 3, 4, 6, 8):
        points, err = sweep(f"uniform{int(ppd * 10)}", ppd, False)
        print(f"uniform {ppd:>3} per decade: {points:3d} points, phase margin error"
              f" {err:.4f} deg")
    server.close()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--latency-ms", type=float, default=1.0)
    parser.add_argument("--skip-demo", action="store_true")
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="loopwright-sweep-"))
    overhead(work, args.latency_ms / 1000)
    if not args.skip_demo:
        demo_time(work)
    adaptive_vs_uniform(work)


if __name__ == "__main__":
    main()
