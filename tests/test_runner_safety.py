"""The generator output goes off on every exit; a killed run resumes without loss.

The simulated bench is served in this test process on loopback TCP; the runner runs
as a separate process (``python -m loopwright run``) against its resource strings, as
it would against hardware, so the test can read the simulated generator's state after
the runner is gone.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.store import load_run


def hardware_style_bench(tmp_path: Path, resources: dict[str, str]) -> Path:
    """A bench file naming the served instruments by resource string, like hardware."""
    path = tmp_path / "bench.yaml"
    path.write_text(
        f"generator:\n  resource: '{resources['generator']}'\n"
        f"scope:\n  resource: '{resources['scope']}'\n"
        "timeout_s: 2.0\n"
        "max_amplitude_vpp: 1.0\n"
        "max_frequency_hz: 1.0e6\n")
    return path


def slow_procedure(tmp_path: Path, count: int = 40, name: str = "slow") -> Path:
    """A sweep whose points take a visible time on a real-time bench (20 cycles at 200 Hz+)."""
    path = tmp_path / f"{name}.yaml"
    path.write_text(
        f"name: {name}\nsign: 1\nmethod: broken_loop\nsteps:\n"
        "  - kind: sweep\n"
        "    start_hz: 200\n    stop_hz: 2000\n"
        f"    count: {count}\n"
        "    amplitude_vpp: 0.2\n"
        "    settle_s: 0.02\n    settle_cycles: 0\n"
        "    cycles_per_record: 10\n    min_samples: 1000\n")
    return path


def start_runner(procedure: Path, bench: Path, out: Path, *extra: str) -> subprocess.Popen:
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    return subprocess.Popen(
        [sys.executable, "-m", "loopwright", "run", str(procedure), "--bench", str(bench),
         "--out", str(out), "--yes", "--no-report", *extra],
        stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        env=env, text=True)


def wait_for_points(out: Path, count: int, process: subprocess.Popen,
                    timeout_s: float = 60.0) -> Path:
    """Wait until the run folder's points.csv holds ``count`` rows."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        assert process.poll() is None, process.communicate()
        for run_dir in out.glob("*"):
            points = run_dir / "points.csv"
            if points.exists() and points.read_text().count("\n") - 1 >= count:
                return run_dir
        time.sleep(0.02)
    raise AssertionError("the runner wrote too few points in time")


@pytest.mark.parametrize(("sig", "exit_code"), [(signal.SIGINT, 130), (signal.SIGTERM, 130)])
def test_output_off_after_signal(tmp_path, start_sim_bench, sig, exit_code):
    server = start_sim_bench("rational", realtime=True, switch=None)
    out = tmp_path / "runs"
    process = start_runner(slow_procedure(tmp_path), hardware_style_bench(tmp_path,
                           server.resources), out)
    run_dir = wait_for_points(out, 3, process)
    assert server.bench.generator.output_on
    process.send_signal(sig)
    _stdout, stderr = process.communicate(timeout=30)
    assert process.returncode == exit_code, stderr
    assert not server.bench.generator.output_on
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert manifest["status"] == "aborted"
    assert manifest["output_off_confirmed"] is True


def test_output_off_after_instrument_stops_answering(tmp_path, start_sim_bench):
    """A scope that stops answering fails the run; the output still goes off."""
    server = start_sim_bench("rational", realtime=True, switch=None)
    out = tmp_path / "runs"
    process = start_runner(slow_procedure(tmp_path), hardware_style_bench(tmp_path,
                           server.resources), out)
    run_dir = wait_for_points(out, 2, process)
    server.instruments["scope"].faults.stop_answering()
    _stdout, stderr = process.communicate(timeout=60)
    assert process.returncode == 1
    assert "run failed" in stderr and "Traceback" not in stderr
    assert not server.bench.generator.output_on
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert manifest["status"] == "failed"
    assert "instrument" in manifest["reason"]


def test_output_off_after_exception_in_process(tmp_path, start_sim_bench, monkeypatch):
    """An error inside the runner (here: the estimator raises) leaves the output off."""
    server = start_sim_bench("rational", switch=None)
    import loopwright.procedure.measure as measure

    calls = {"n": 0}
    real = measure.estimate_point

    def failing(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] > 4:
            raise RuntimeError("injected failure")
        return real(*args, **kwargs)

    monkeypatch.setattr(measure, "estimate_point", failing)
    with pytest.raises(RuntimeError, match="injected"):
        run_procedure(slow_procedure(tmp_path), hardware_style_bench(tmp_path,
                      server.resources), RunOptions(out_dir=tmp_path / "runs", quiet=True,
                                                    assume_yes=True, render_report=False))
    assert not server.bench.generator.output_on
    run_dir = next((tmp_path / "runs").iterdir())
    assert json.loads((run_dir / "manifest.json").read_text())["status"] == "failed"


def test_point_that_cannot_be_estimated_is_skipped_and_recorded(tmp_path, start_sim_bench,
                                                               monkeypatch):
    """An EstimationError at one point: that point is skipped and listed in the manifest's
    recoveries, every other point is stored once, and the run completes."""
    from loopwright.errors import EstimationError
    from loopwright.procedure.plan import frequency_plan
    from loopwright.procedure.schema import load_procedure

    server = start_sim_bench("rational", switch=None)
    import loopwright.procedure.measure as measure

    procedure = slow_procedure(tmp_path, count=5)
    plan = frequency_plan(load_procedure(procedure).steps[0])
    skipped_hz = float(plan[2])
    real = measure.estimate_point

    def failing(reference, response, rate, frequency_hz, **kwargs):
        if frequency_hz == skipped_hz:
            raise EstimationError("injected: flat reference")
        return real(reference, response, rate, frequency_hz, **kwargs)

    monkeypatch.setattr(measure, "estimate_point", failing)
    outcome = run_procedure(procedure, hardware_style_bench(tmp_path, server.resources),
                            RunOptions(out_dir=tmp_path / "runs", quiet=True,
                                       assume_yes=True, render_report=False))
    assert outcome.status == "complete"
    stored = pd.read_csv(outcome.run_dir / "points.csv")["frequency_hz"].to_numpy()
    np.testing.assert_array_equal(np.sort(stored), np.delete(plan, 2))
    manifest = json.loads((outcome.run_dir / "manifest.json").read_text())
    assert [r["frequency_hz"] for r in manifest["recoveries"]] == [skipped_hz]
    assert manifest["recoveries"][0]["action"] == "point skipped"
    assert not server.bench.generator.output_on


def test_resume_after_sigkill_loses_and_repeats_nothing(tmp_path, start_sim_bench):
    """SIGKILL mid-sweep, then --resume: every point before the kill kept, none twice."""
    server = start_sim_bench("rational", realtime=True, switch=None)
    out = tmp_path / "runs"
    procedure = slow_procedure(tmp_path, count=24)
    bench = hardware_style_bench(tmp_path, server.resources)
    process = start_runner(procedure, bench, out)
    run_dir = wait_for_points(out, 6, process)
    process.kill()
    process.communicate(timeout=10)
    before = pd.read_csv(run_dir / "points.csv")
    assert len(before) >= 6
    # a killed runner cannot switch anything off; a resume starts from a fresh state
    resumed = start_runner(procedure, bench, out, "--resume", str(run_dir))
    _stdout, stderr = resumed.communicate(timeout=120)
    assert resumed.returncode == 0, stderr
    after = load_run(run_dir).points
    assert len(after) == 24
    assert after["frequency_hz"].is_unique
    expected = np.geomspace(200.0, 2000.0, 24)
    np.testing.assert_allclose(np.sort(after["frequency_hz"].to_numpy()), expected, rtol=1e-12)
    # the rows measured before the kill are unchanged (same timestamps, same values)
    kept = after.iloc[: len(before)]
    assert list(kept["timestamp_utc"]) == list(before["timestamp_utc"])
    assert not server.bench.generator.output_on
    assert json.loads((run_dir / "manifest.json").read_text())["status"] == "complete"


def test_short_settling_is_flagged_unsettled(tmp_path, start_sim_bench):
    """A lightly damped DUT measured without settling: points flagged unsettled.

    The DUT is an invented 2 kHz pole pair with Q = 125 (decay time constant
    Q / (pi f0) = 20 ms, textbook second-order response); records of 10 cycles (5 ms)
    start well inside the transient when the runner does not wait, even on a loaded
    machine.
    """
    dut = tmp_path / "slow.yaml"
    dut.write_text("model: rational\npoles_hz: ['-8+2000j']\nzeros_hz: []\ndc_gain: -0.5\n")
    server = start_sim_bench(str(dut), switch=None)

    def sweep(settle: str) -> pd.DataFrame:
        procedure = tmp_path / "p.yaml"
        procedure.write_text(
            "name: settle\nsign: 1\nmethod: broken_loop\nsteps:\n  - kind: sweep\n"
            "    start_hz: 1500\n    stop_hz: 2500\n    count: 8\n    amplitude_vpp: 0.5\n"
            f"{settle}    cycles_per_record: 10\n    min_samples: 2000\n")
        outcome = run_procedure(procedure, hardware_style_bench(tmp_path, server.resources),
                                RunOptions(out_dir=tmp_path / settle.strip()[:9], quiet=True,
                                           assume_yes=True, render_report=False))
        return load_run(outcome.run_dir).points

    hurried = sweep("    settle_s: 0\n    settle_cycles: 0\n")
    patient = sweep("    settle_s: 0.25\n    settle_cycles: 0\n")
    unsettled_hurried = hurried["flags"].str.contains("unsettled").sum()
    unsettled_patient = patient["flags"].str.contains("unsettled").sum()
    assert unsettled_hurried >= 6
    assert unsettled_patient == 0


def test_plan_the_instruments_cannot_do_is_refused_before_output(tmp_path, start_sim_bench,
                                                                 capsys):
    """An amplitude below the generator driver's minimum: exit 2, nothing switched on."""
    from loopwright.cli import main

    server = start_sim_bench("rational", switch=None)
    procedure = tmp_path / "tiny.yaml"
    procedure.write_text("name: tiny\nsign: 1\nmethod: broken_loop\nsteps:\n"
                         "  - kind: sweep\n    start_hz: 100\n    stop_hz: 1000\n"
                         "    count: 4\n    amplitude_vpp: 0.0001\n")
    code = main(["run", str(procedure), "--bench",
                 str(hardware_style_bench(tmp_path, server.resources)),
                 "--out", str(tmp_path / "runs"), "--yes", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    assert f"{procedure}:5: steps[0]: amplitude_vpp = 0.0001" in err
    assert not server.bench.generator.output_on
    assert "OUTP1 ON" not in (next((tmp_path / "runs").iterdir()) / "traffic.log").read_text()


def test_channel_the_scope_lacks_is_refused_before_output(tmp_path, start_sim_bench, capsys):
    """channels.reference: 3 on a two-channel scope: exit 2 naming the bench line, no output."""
    from loopwright.cli import main

    server = start_sim_bench("rational", switch=None)
    bench = hardware_style_bench(tmp_path, server.resources)
    bench.write_text(bench.read_text() + "channels:\n  reference: 3\n  response: 2\n")
    code = main(["run", str(slow_procedure(tmp_path, count=4)), "--bench", str(bench),
                 "--out", str(tmp_path / "runs"), "--yes", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert f"{bench}:9: channels.reference: channel must be one of [1, 2], got 3" in err
    assert not server.bench.generator.output_on
    assert "OUTP1 ON" not in (next((tmp_path / "runs").iterdir()) / "traffic.log").read_text()


def test_profile_corner_a_refined_point_could_reach_is_refused_before_output(
        tmp_path, start_sim_bench, capsys):
    """A refined sweep whose profile dips below the driver's 0.001 Vpp between planned
    points: exit 2 before any output (a refined point there would be refused mid-run)."""
    from loopwright.cli import main

    server = start_sim_bench("rational", switch=None)
    procedure = tmp_path / "dip.yaml"
    procedure.write_text(
        "name: dip\nsign: 1\nmethod: broken_loop\nsteps:\n"
        "  - kind: sweep\n    frequencies_hz: [1000, 10000]\n"
        "    amplitude_profile:\n"
        "      - {frequency_hz: 100, amplitude_vpp: 0.01}\n"
        "      - {frequency_hz: 3000, amplitude_vpp: 0.0005}\n"
        "      - {frequency_hz: 100000, amplitude_vpp: 0.01}\n"
        "    refine: {max_extra_points: 4}\n")
    code = main(["run", str(procedure), "--bench",
                 str(hardware_style_bench(tmp_path, server.resources)),
                 "--out", str(tmp_path / "runs"), "--yes", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert "amplitude_vpp = 0.0005 is outside what the generator" in err
    assert not server.bench.generator.output_on


def test_output_is_off_while_the_operator_answers_a_prompt(tmp_path, start_sim_bench):
    """sweep, prompt, sweep: no stimulus while the operator handles the board; the second
    sweep switches the output on again and measures every point."""
    server = start_sim_bench("rational", switch=None)
    sweep = ("  - kind: sweep\n    frequencies_hz: [500, 1000]\n    amplitude_vpp: 0.2\n"
             "    settle_cycles: 2\n    cycles_per_record: 10\n    min_samples: 1000\n")
    procedure = tmp_path / "prompted.yaml"
    procedure.write_text("name: prompted\nsign: 1\nmethod: broken_loop\nsteps:\n" + sweep
                         + "  - kind: prompt\n    text: Move the probe.\n" + sweep)
    seen = []

    def answer(_text: str) -> str:
        seen.append(server.bench.generator.output_on)
        return ""

    outcome = run_procedure(procedure, hardware_style_bench(tmp_path, server.resources),
                            RunOptions(out_dir=tmp_path / "runs", quiet=True,
                                       assume_yes=True, render_report=False,
                                       input_fn=answer))
    assert outcome.status == "complete"
    assert seen == [False]
    points = pd.read_csv(outcome.run_dir / "points.csv")
    assert list(points["step"]) == [0, 0, 2, 2]
    assert not server.bench.generator.output_on
