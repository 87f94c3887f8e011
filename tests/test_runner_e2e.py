"""End to end: procedure -> runner -> drivers -> pyvisa-py over loopback TCP -> simulated DUT.

Each DUT model's figures from a measured sweep are checked against the same figures of
the model's exact response (python-control / scipy compute the exact response in the
DUT tests; here the reference is the model's own exact ``loop_response`` on a dense grid,
analysed by the same analysis code, so only the measurement chain is under test).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from loopwright.analysis import FrequencyResponse, analyze_loop
from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.store import load_run
from mock_instruments.duts import load_dut


def write_bench(tmp_path: Path, dut: str, *, noise_v_rms: float = 1e-5, seed: int = 3,
                switch: bool = True, transport: str = "tcp", **dut_params: object) -> Path:
    """A bench file for the simulated bench; DUT overrides go to a DUT file."""
    dut_ref = dut
    if dut_params:
        dut_file = tmp_path / f"{dut}-dut.yaml"
        lines = [f"model: {dut}"] + [f"{k}: {v}" for k, v in dut_params.items()]
        dut_file.write_text("\n".join(lines) + "\n")
        dut_ref = str(dut_file)
    bench = tmp_path / "bench.yaml"
    bench.write_text(
        "simulated:\n"
        f"  dut: {dut_ref}\n"
        f"  noise_v_rms: {noise_v_rms}\n"
        f"  seed: {seed}\n"
        f"  transport: {transport}\n"
        "max_amplitude_vpp: 2.0\n"
        "max_frequency_hz: 2.0e7\n")
    return bench


def write_procedure(tmp_path: Path, start_hz: float, stop_hz: float, *,
                    points_per_decade: int = 20, amplitude_vpp: float = 0.05,
                    extra: str = "", refine: bool = False, name: str = "e2e") -> Path:
    text = (
        f"name: {name}\n"
        "sign: 1\n"
        "method: broken_loop\n"
        "steps:\n"
        "  - kind: sweep\n"
        f"    start_hz: {start_hz!r}\n"
        f"    stop_hz: {stop_hz!r}\n"
        f"    points_per_decade: {points_per_decade}\n"
        f"    amplitude_vpp: {amplitude_vpp}\n"
        "    settle_cycles: 30\n"
        "    cycles_per_record: 10\n"
        "    min_samples: 2048\n"
    )
    if refine:
        text += ("    refine:\n      max_extra_points: 12\n      max_phase_step_deg: 5\n"
                 "      max_gain_step_db: 1\n")
    text += extra
    path = tmp_path / f"{name}.yaml"
    path.write_text(text)
    return path


def exact_figures(dut_name: str, start_hz: float, stop_hz: float, **params: object) -> dict:
    """Figures of the model's exact response on a dense grid (the reference)."""
    dut = load_dut(dut_name, **params)
    f = np.geomspace(start_hz, stop_hz, 4000)
    return analyze_loop(FrequencyResponse(f, dut.loop_response(f))).to_dict()


def run(tmp_path: Path, procedure: Path, bench: Path) -> dict:
    outcome = run_procedure(procedure, bench,
                            RunOptions(out_dir=tmp_path / "runs", serial="t1", quiet=True,
                                       render_report=False))
    assert outcome.status == "complete", outcome.reason
    assert outcome.output_off
    return json.loads((outcome.run_dir / "summary.json").read_text())


# (DUT, sweep start, stop, overrides): our own invented values, see mock_instruments/duts.
STABLE_LOOPS = [
    ("rational", 200.0, 2e5, {}),
    ("opamp_capload", 2e4, 1.5e7, {}),
    ("buck_injection", 100.0, 2e5, {}),
]


@pytest.mark.parametrize(("dut", "start_hz", "stop_hz", "params"), STABLE_LOOPS,
                         ids=[c[0] for c in STABLE_LOOPS])
def test_stable_loop_margins_match_model(tmp_path, dut, start_hz, stop_hz, params):
    """Phase/gain margin and crossover within stated tolerances of the exact model."""
    expected = exact_figures(dut, start_hz, stop_hz, **params)
    summary = run(tmp_path, write_procedure(tmp_path, start_hz, stop_hz),
                  write_bench(tmp_path, dut, **params))
    got = summary["analysis"]
    assert expected["phase_margin_deg"] is not None
    # tolerance: 1 deg of phase margin, 1 % of crossover frequency, 0.3 dB of gain margin
    assert got["phase_margin_deg"] == pytest.approx(expected["phase_margin_deg"], abs=1.0)
    assert got["phase_margin_frequency_hz"] == pytest.approx(
        expected["phase_margin_frequency_hz"], rel=0.01)
    if expected["gain_margin_db"] is not None:
        assert got["gain_margin_db"] == pytest.approx(expected["gain_margin_db"], abs=0.3)


OSCILLATORS = [
    ("lc_oscillator", 0.9e6, 2.4e6),
    ("wien", 200.0, 5000.0),
    ("phase_shift", 500.0, 20000.0),
]


@pytest.mark.parametrize(("dut", "start_hz", "stop_hz"), OSCILLATORS,
                         ids=[c[0] for c in OSCILLATORS])
def test_oscillator_barkhausen_matches_model(tmp_path, dut, start_hz, stop_hz):
    """Predicted oscillation frequency within 0.5 %, excess gain within 3 % of exact."""
    expected = exact_figures(dut, start_hz, stop_hz)
    assert expected["oscillation_predicted"]
    summary = run(tmp_path, write_procedure(tmp_path, start_hz, stop_hz, amplitude_vpp=0.02),
                  write_bench(tmp_path, dut))
    got = summary["analysis"]
    assert got["oscillation_predicted"]
    assert got["oscillation_frequency_hz"] == pytest.approx(
        expected["oscillation_frequency_hz"], rel=0.005)
    # a small stimulus keeps the soft saturation out of it: excess gain within 3 %
    assert got["excess_gain"] == pytest.approx(expected["excess_gain"], rel=0.03)


def test_closed_loop_check_finds_free_running_oscillation(tmp_path):
    """The relay closes the loop; the oscillation is near the open-loop prediction."""
    extra = ("  - kind: closed_loop_check\n    switch: relay\n    settle_s: 0.05\n"
             "    record_cycles: 60\n    frequency_tolerance_pct: 2\n")
    procedure = write_procedure(tmp_path, 0.9e6, 2.4e6, points_per_decade=30,
                                amplitude_vpp=0.02, extra=extra)
    summary = run(tmp_path, procedure, write_bench(tmp_path, "lc_oscillator"))
    closed = summary["closed_loop"]
    assert closed["oscillating"]
    # practice (references.md): the closed loop runs within a few % of the 0 deg point
    assert abs(closed["frequency_error_pct"]) < 2.0
    assert closed["amplitude_v"] > 0.01
    run_dir = next((tmp_path / "runs").iterdir())
    with np.load(run_dir / "closed_loop.npz") as data:
        assert data["response_v"].size > 10


def test_closed_loop_record_gets_a_timeout_that_covers_it(tmp_path, monkeypatch):
    """A closed-loop record far longer than the last sweep point's (2000 cycles against
    10) is waited for in full: every acquisition's timeout exceeds the bench's I/O
    timeout by at least the record's own duration."""
    from loopwright.instruments.template_roles import TemplateScope

    seen = []
    real = TemplateScope.acquire

    def spy(self, channels, timeout_s=10.0):
        capture = real(self, channels, timeout_s=timeout_s)
        seen.append((timeout_s, capture.record_length / capture.sample_rate_hz))
        return capture

    monkeypatch.setattr(TemplateScope, "acquire", spy)
    extra = ("  - kind: closed_loop_check\n    switch: relay\n    settle_s: 0.05\n"
             "    record_cycles: 2000\n")
    procedure = write_procedure(tmp_path, 1.4e6, 1.6e6, points_per_decade=20,
                                amplitude_vpp=0.02, extra=extra)
    bench = write_bench(tmp_path, "lc_oscillator")
    run(tmp_path, procedure, bench)
    io_timeout_s = 5.0  # the bench file's default timeout_s
    assert max(duration for _, duration in seen) > 100 * min(d for _, d in seen)
    for timeout_s, duration_s in seen:
        assert timeout_s - io_timeout_s >= duration_s, (timeout_s, duration_s)


def test_in_process_transport_gives_the_same_points(tmp_path):
    """The in-process pyvisa backend runs the same driver code as TCP."""
    procedure = write_procedure(tmp_path, 200.0, 2e4, points_per_decade=5)
    a = run(tmp_path / "a", procedure, write_bench(tmp_path, "rational", noise_v_rms=0.0))
    b = run(tmp_path / "b", procedure,
            write_bench(tmp_path, "rational", noise_v_rms=0.0, transport="in_process"))
    assert a["analysis"]["phase_margin_deg"] == pytest.approx(
        b["analysis"]["phase_margin_deg"], abs=1e-3)


def test_refinement_reaches_crossover_with_fewer_points(tmp_path):
    """Adaptive refinement: crossover within 0.5 % with fewer points than uniform.

    Reference: the model's exact crossover. The sparse plan (one point per decade)
    gets up to 4 points where the response crosses |H| = 1 or 0 deg; the uniform plan
    is the coarsest log plan whose crossover is within 0.5 % (searched below).
    Measured here: refined 8 points, uniform 9 (2.5 per decade); see README.
    """
    exact = exact_figures("rational", 100.0, 1e5)["phase_margin_frequency_hz"]
    bench = write_bench(tmp_path, "rational", noise_v_rms=0.0)

    def plan(name: str, ppd: float, refine: bool) -> Path:
        path = write_procedure(tmp_path, 100.0, 1e5, points_per_decade=1, name=name)
        text = path.read_text().replace("points_per_decade: 1", f"points_per_decade: {ppd}")
        if refine:
            text += ("    refine:\n      max_extra_points: 4\n      max_phase_step_deg: 60\n"
                     "      max_gain_step_db: 30\n      near_crossings: true\n")
        path.write_text(text)
        return path

    summary = run(tmp_path / "r", plan("sparse", 1, True), bench)
    refined_points = summary["points"]
    assert summary["analysis"]["phase_margin_frequency_hz"] == pytest.approx(exact, rel=0.005)
    uniform_points = None
    for ppd in (1, 1.5, 2, 2.5, 3, 4, 6, 8):
        result = run(tmp_path / f"u{ppd}", plan(f"uniform{int(ppd * 10)}", ppd, False), bench)
        if math.isclose(result["analysis"]["phase_margin_frequency_hz"], exact, rel_tol=0.005):
            uniform_points = result["points"]
            break
    print(f"refined: {refined_points} points; uniform of the same accuracy: {uniform_points}")
    assert uniform_points is not None
    assert refined_points < uniform_points


def test_run_folder_is_complete(tmp_path):
    """manifest, points, summary, traffic log: the contract of the run folder."""
    procedure = write_procedure(tmp_path, 300.0, 3e4, points_per_decade=4)
    run(tmp_path, procedure, write_bench(tmp_path, "rational"))
    run_dir = next((tmp_path / "runs").iterdir())
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert manifest["status"] == "complete"
    assert "simulated" in manifest["instruments"]["generator"]["idn"]
    assert manifest["instruments"]["scope"]["driver"] == "scope-block"
    loaded = load_run(run_dir)
    assert len(loaded.points) == 9
    assert (run_dir / "traffic.log").stat().st_size > 0
    assert "SOUR1:FREQ" in (run_dir / "traffic.log").read_text()
