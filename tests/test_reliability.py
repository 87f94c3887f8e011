"""Faults a real bench throws at an overnight run, injected over real pyvisa-py TCP.

Each case serves the simulated bench on loopback TCP, runs a short sweep through the
real runner and drivers, and injects one fault through the simulated instruments'
fault hooks. For every case: the run completes after a bounded retry with reconnect,
or it stops with a clear reason in the manifest; the generator output is off; no
measured point is lost (every point the runner reported is in points.csv, none
twice); and a stopped run resumes to completion once the fault is gone.

``pytest -m reliability`` runs the set and prints a table of faults injected,
survived, points lost (must be 0) and output left on (must be 0).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from loopwright.errors import RunError
from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.store import load_run

pytestmark = pytest.mark.reliability

POINTS = 14
PLAN_HZ = np.geomspace(300.0, 30_000.0, POINTS)


@dataclass
class Outcome:
    fault: str
    survived: bool
    how: str
    points_lost: int
    output_left_on: int


RESULTS: list[Outcome] = []


def table_lines() -> list[str]:
    """The reliability table (printed by tests/conftest.py at the end of the session)."""
    lines = ["reliability: faults injected through the simulated bench over TCP",
             f"{'fault':44} {'survived':9} {'points lost':12} {'output on':9} how"]
    for r in RESULTS:
        lines.append(f"{r.fault:44} {'yes' if r.survived else 'NO':9} "
                     f"{r.points_lost:<12d} {r.output_left_on:<9d} {r.how}")
    lines.append(
        f"total: {len(RESULTS)} faults injected, {sum(r.survived for r in RESULTS)} survived,"
        f" {sum(r.points_lost for r in RESULTS)} points lost,"
        f" {sum(r.output_left_on for r in RESULTS)} outputs left on")
    return lines


def bench_file(tmp_path: Path, resources: dict[str, str], timeout_s: float = 1.0) -> Path:
    path = tmp_path / "bench.yaml"
    path.write_text(
        f"generator:\n  resource: '{resources['generator']}'\n"
        f"scope:\n  resource: '{resources['scope']}'\n"
        f"timeout_s: {timeout_s}\n"
        "max_amplitude_vpp: 2.0\nmax_frequency_hz: 1.0e6\n")
    return path


def procedure_file(tmp_path: Path, *, amplitude: str = "    amplitude_vpp: 0.2\n",
                   autorange: bool = True) -> Path:
    path = tmp_path / "faults.yaml"
    path.write_text(
        "name: faults\nsign: 1\nmethod: broken_loop\nsteps:\n  - kind: sweep\n"
        f"    start_hz: 300\n    stop_hz: 30000\n    count: {POINTS}\n{amplitude}"
        "    settle_s: 0\n    settle_cycles: 2\n    cycles_per_record: 8\n"
        f"    min_samples: 1024\n    autorange: {str(autorange).lower()}\n")
    return path


class PointWatcher:
    """Calls ``action`` once, when points.csv under ``out`` first holds ``count`` rows."""

    def __init__(self, out: Path, count: int, action: Callable[[], None]) -> None:
        self.out, self.count, self.action = out, count, action
        self.fired = threading.Event()
        self._stop = threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self) -> None:
        while not self._stop.is_set():
            for points in self.out.glob("*/points.csv"):
                if points.read_text().count("\n") - 1 >= self.count:
                    self.action()
                    self.fired.set()
                    return
            time.sleep(0.005)

    def stop(self) -> None:
        self._stop.set()
        self.thread.join(timeout=5)


def run_with_fault(tmp_path: Path, server, procedure: Path, arm: Callable[[], None],
                   after_points: int = 4):
    """Run the procedure; arm the fault once ``after_points`` points are on disk."""
    out = tmp_path / "runs"
    watcher = PointWatcher(out, after_points, arm)
    error = None
    try:
        outcome = run_procedure(procedure, bench_file(tmp_path, server.resources),
                                RunOptions(out_dir=out, quiet=True, assume_yes=True,
                                           render_report=False))
    except RunError as exc:
        outcome, error = None, exc
    finally:
        watcher.stop()
    assert watcher.fired.is_set(), "the fault was never armed"
    run_dir = next(out.iterdir())
    return outcome, error, run_dir


def account(fault: str, run_dir: Path, server, *, expect_complete: bool,
            how: str) -> Outcome:
    """Check the invariants and record the case for the table."""
    manifest = json.loads((run_dir / "manifest.json").read_text())
    points = load_run(run_dir).points
    duplicated = int(points["frequency_hz"].duplicated().sum())
    # every reported point is on disk: indices are 0..n-1 with no gap
    gaps = int(len(points) - (points["index"].max() + 1)) if len(points) else 0
    lost = abs(gaps) + duplicated
    if expect_complete:
        lost += POINTS - len(points)
    output_on = int(server.bench.generator.output_on)
    survived = (lost == 0 and output_on == 0 and manifest["output_off_confirmed"]
                and (manifest["status"] == "complete") == expect_complete
                and (expect_complete or bool(manifest["reason"])))
    result = Outcome(fault, survived, how if expect_complete else
                     f"{how}: {manifest['status']} ({manifest['reason'][:50]})",
                     lost, output_on)
    RESULTS.append(result)
    return result


def resume_after(tmp_path: Path, run_dir: Path, server, procedure: Path) -> None:
    """A stopped run resumes to completion once the fault is cleared."""
    for instrument in server.instruments.values():
        instrument.faults.clear()
    before = pd.read_csv(run_dir / "points.csv")
    outcome = run_procedure(procedure, bench_file(tmp_path, server.resources),
                            RunOptions(resume=run_dir, quiet=True, assume_yes=True,
                                       render_report=False))
    assert outcome.status == "complete"
    after = load_run(run_dir).points
    assert len(after) == POINTS and after["frequency_hz"].is_unique
    assert list(after["timestamp_utc"][: len(before)]) == list(before["timestamp_utc"])
    assert not server.bench.generator.output_on


def test_connection_dropped_mid_sweep(tmp_path, start_sim_bench):
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4)
    scope = server.instruments["scope"]
    outcome, error, run_dir = run_with_fault(
        tmp_path, server, procedure_file(tmp_path),
        lambda: scope.faults.drop_connection(at_message=3))
    assert error is None and outcome.status == "complete"
    result = account("connection dropped (scope)", run_dir, server, expect_complete=True,
                     how="reconnected, point retried")
    assert result.survived
    assert json.loads((run_dir / "manifest.json").read_text())["recoveries"]


def test_late_reply_is_not_taken_for_the_next_answer(tmp_path, start_sim_bench):
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4)
    scope = server.instruments["scope"]
    outcome, error, run_dir = run_with_fault(
        tmp_path, server, procedure_file(tmp_path),
        lambda: scope.faults.delay_reply(1.6, at_query=2))
    assert error is None and outcome.status == "complete"
    result = account("reply late past the timeout (scope)", run_dir, server,
                     expect_complete=True, how="stale reply dropped, point retried")
    assert result.survived
    # the late reply did not shift the answers: the points agree with the model
    points = load_run(run_dir).points
    exact = server.bench.exact_response(points["frequency_hz"].to_numpy())
    measured = points["gain_re"].to_numpy() + 1j * points["gain_im"].to_numpy()
    np.testing.assert_allclose(measured, exact, rtol=0.02)


def test_garbage_reply(tmp_path, start_sim_bench):
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4)
    scope = server.instruments["scope"]
    outcome, error, run_dir = run_with_fault(
        tmp_path, server, procedure_file(tmp_path),
        lambda: scope.faults.garbage_reply(at_query=3))
    assert error is None and outcome.status == "complete"
    assert account("garbage reply (scope)", run_dir, server, expect_complete=True,
                   how="resynchronised, point retried").survived


def test_error_pushed_onto_the_queue(tmp_path, start_sim_bench):
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4)
    generator = server.instruments["generator"]
    outcome, error, run_dir = run_with_fault(
        tmp_path, server, procedure_file(tmp_path),
        lambda: generator.faults.push_error(-310, "System error"))
    assert error is None and outcome.status == "complete"
    assert account("error pushed on the SCPI queue (generator)", run_dir, server,
                   expect_complete=True, how="reported, point retried").survived


def test_acquisition_that_never_completes(tmp_path, start_sim_bench):
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4)
    scope = server.instruments["scope"]
    procedure = procedure_file(tmp_path)
    _outcome, error, run_dir = run_with_fault(
        tmp_path, server, procedure, lambda: scope.faults.never_complete_acquisition())
    assert error is not None
    result = account("acquisition never completes (scope)", run_dir, server,
                     expect_complete=False, how="retried, then stopped")
    assert result.survived
    resume_after(tmp_path, run_dir, server, procedure)


def test_generator_refuses_an_amplitude(tmp_path, start_sim_bench):
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4)
    generator = server.instruments["generator"]
    profile = ("    amplitude_profile:\n      - {frequency_hz: 300, amplitude_vpp: 0.2}\n"
               "      - {frequency_hz: 30000, amplitude_vpp: 1.5}\n")
    procedure = procedure_file(tmp_path, amplitude=profile)
    _outcome, error, run_dir = run_with_fault(
        tmp_path, server, procedure, lambda: generator.faults.refuse_amplitude_above(0.5))
    assert error is not None and "-222" in str(error)
    result = account("generator refuses an amplitude", run_dir, server,
                     expect_complete=False, how="refusal reported")
    assert result.survived
    resume_after(tmp_path, run_dir, server, procedure)


def test_clipped_capture_is_flagged(tmp_path, start_sim_bench):
    """Autorange off and a scale far too small: every point flagged, none dropped."""
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4)
    procedure = procedure_file(tmp_path, amplitude="    amplitude_vpp: 1.5\n",
                               autorange=False)

    def squeeze() -> None:
        # the operator (or a stuck front panel) sets 10 mV/div behind the runner's back
        for channel in server.bench.channels.values():
            channel.scale_v_per_div = 0.01

    _outcome, error, run_dir = run_with_fault(tmp_path, server, procedure, squeeze,
                                             after_points=1)
    assert error is None
    points = load_run(run_dir).points
    assert points["flags"].iloc[3:].str.contains("clipped").all()
    assert account("clipped capture", run_dir, server, expect_complete=True,
                   how="points flagged clipped").survived


def test_instrument_that_stops_answering(tmp_path, start_sim_bench):
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4)
    scope = server.instruments["scope"]
    procedure = procedure_file(tmp_path)
    _outcome, error, run_dir = run_with_fault(tmp_path, server, procedure,
                                             lambda: scope.faults.stop_answering())
    assert error is not None and "TCPIP" in str(error)
    result = account("instrument stops answering (scope)", run_dir, server,
                     expect_complete=False, how="retried with reconnect, then stopped")
    assert result.survived
    resume_after(tmp_path, run_dir, server, procedure)


def test_generator_drops_and_comes_back(tmp_path, start_sim_bench):
    """The generator's link drops; the runner reopens it and goes on."""
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4)
    generator = server.instruments["generator"]
    outcome, error, run_dir = run_with_fault(
        tmp_path, server, procedure_file(tmp_path),
        lambda: generator.faults.stop_answering(until_reconnect=True))
    assert error is None and outcome.status == "complete"
    assert account("generator stops answering until reconnect", run_dir, server,
                   expect_complete=True, how="reconnected, point retried").survived


def test_runner_killed_and_resumed(tmp_path, start_sim_bench):
    """SIGKILL: nothing can switch the output off in the dying process; the resumed
    run does, and every point before the kill is kept."""
    server = start_sim_bench("rational", switch=None, noise_v_rms=1e-4, realtime=True)
    out = tmp_path / "runs"
    procedure = procedure_file(tmp_path)
    bench = bench_file(tmp_path, server.resources, timeout_s=2.0)
    command = [sys.executable, "-m", "loopwright", "run", str(procedure), "--bench",
               str(bench), "--out", str(out), "--yes", "--no-report", "--quiet"]
    process = subprocess.Popen(command, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE, env=dict(os.environ))
    deadline = time.monotonic() + 60
    run_dir = None
    while time.monotonic() < deadline and run_dir is None:
        for points in out.glob("*/points.csv"):
            if points.read_text().count("\n") - 1 >= 5:
                run_dir = points.parent
        time.sleep(0.01)
    assert run_dir is not None
    process.send_signal(signal.SIGKILL)
    process.communicate(timeout=10)
    resumed = subprocess.run([*command, "--resume", str(run_dir)], stdin=subprocess.DEVNULL,
                             capture_output=True, timeout=120, env=dict(os.environ))
    assert resumed.returncode == 0, resumed.stderr
    assert account("runner killed (SIGKILL), then resumed", run_dir, server,
                   expect_complete=True, how="resumed, no point repeated").survived
