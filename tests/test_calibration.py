"""Channel calibration end to end on the simulated bench (loopback TCP, pyvisa-py).

The simulated bench is given a channel-2 mismatch of its own (gain error, probe delay,
first-order probe pole; invented values). The mismatch is an exact rational function
times a delay, so every check compares against a closed form:
``m(f) = (1 + g) exp(-j 2 pi f d) / (1 + j f / f_p)`` (a first-order low-pass and a pure
delay, textbook forms) and ``H(f)`` of the DUT model (``bench.exact_response``).
A calibration puts both probes on one node, so channel 2 / channel 1 = m(f); dividing
it out of the sweep must give back H(f). The bench is noise-free with an ideal ADC,
hence the 1e-4 relative tolerances.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from loopwright.errors import InputError, RunError
from loopwright.procedure.plan import frequency_plan
from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.procedure.schema import check_against_bench, load_bench, load_procedure
from loopwright.store import load_run
from loopwright.store.load import read_calibration
from mock_instruments.bench import Impairments
from mock_instruments.relay import PROBE_RELAY

#: The invented channel-2 mismatch: +4 % gain, 3 us of probe delay, a 40 kHz probe pole.
MISMATCH = {"channel2_gain_error": 0.04, "channel2_delay_s": 3e-6, "channel2_pole_hz": 40e3}
#: Noise-free, ideal converter: estimates are exact to ~1e-9, far inside the tolerance.
RELATIVE_TOLERANCE = 1e-4

SWEEP_KEYS = (
    "    start_hz: 100\n    stop_hz: 20000\n    points_per_decade: 3\n"
    "    amplitude_vpp: 0.2\n"
    "    settle_s: 0.005\n    settle_cycles: 0\n"
    "    cycles_per_record: 8\n    min_samples: 1000\n")


def _bench_file(tmp_path: Path, resources: dict[str, str], *, switch: bool = True) -> Path:
    """A bench file naming the served instruments by resource string, like hardware."""
    text = (f"generator:\n  resource: '{resources['generator']}'\n"
            f"scope:\n  resource: '{resources['scope']}'\n")
    if switch:
        text += f"switch:\n  resource: '{resources['switch']}'\n"
    text += "timeout_s: 3.0\nmax_amplitude_vpp: 1.0\nmax_frequency_hz: 1.0e6\n"
    path = tmp_path / "bench.yaml"
    path.write_text(text)
    return path


def _procedure_file(tmp_path: Path, steps: str, name: str = "cal") -> Path:
    path = tmp_path / f"{name}.yaml"
    path.write_text(f"name: {name}\nsign: 1\nmethod: broken_loop\nsteps:\n{steps}")
    return path


def _serve(start_sim_bench, **mismatch: float):
    impairments = Impairments(adc_bits=0, **mismatch)
    return start_sim_bench("rational", impairments=impairments)


def _options(tmp_path: Path, **changes) -> RunOptions:
    return RunOptions(out_dir=tmp_path / "runs", quiet=True, render_report=False, assume_yes=True,
                      **changes)


def _relative_error(measured: np.ndarray, wanted: np.ndarray) -> float:
    return float(np.max(np.abs(measured / wanted - 1.0)))


def _sweep_h(run_dir: Path, step: int) -> tuple[np.ndarray, np.ndarray]:
    points = load_run(run_dir).points
    rows = points[points["step"] == step]
    return (rows["frequency_hz"].to_numpy(float),
            rows["gain_re"].to_numpy(float) + 1j * rows["gain_im"].to_numpy(float))


def test_mismatch_formula_matches_the_bench(start_sim_bench) -> None:
    """The bench's own mismatch is the closed form in the module doc (first-order
    low-pass times a pure delay, textbook)."""
    server = _serve(start_sim_bench, **MISMATCH)
    f = np.array([10.0, 1e3, 40e3, 1e5])
    g, d, fp = (MISMATCH["channel2_gain_error"], MISMATCH["channel2_delay_s"],
                MISMATCH["channel2_pole_hz"])
    closed_form = (1 + g) * np.exp(-2j * np.pi * f * d) / (1 + 1j * f / fp)
    np.testing.assert_allclose(server.bench.channel2_mismatch(f), closed_form, rtol=1e-12)
    # at the pole: |m| = (1 + g) / sqrt(2), phase -45 deg minus the delay's
    at_pole = server.bench.channel2_mismatch(fp)
    assert abs(at_pole) == pytest.approx((1 + g) / np.sqrt(2), rel=1e-12)
    assert np.degrees(np.angle(at_pole)) == pytest.approx(-45.0 - 360 * fp * d, rel=1e-12)


def test_without_calibration_the_sweep_carries_the_mismatch(tmp_path, start_sim_bench
                                                            ) -> None:
    """(a) A sweep alone measures H * m: off from the exact H by the mismatch."""
    server = _serve(start_sim_bench, **MISMATCH)
    bench_path = _bench_file(tmp_path, server.resources)
    procedure = _procedure_file(tmp_path, "  - kind: sweep\n" + SWEEP_KEYS)
    outcome = run_procedure(procedure, bench_path, _options(tmp_path))
    assert outcome.status == "complete"
    f, h = _sweep_h(outcome.run_dir, 0)
    exact = server.bench.exact_response(f)
    mismatch = server.bench.channel2_mismatch(f)
    assert _relative_error(h, exact * mismatch) < RELATIVE_TOLERANCE
    # the mismatch is far above the tolerance everywhere: at least the 4 % gain error
    assert np.min(np.abs(h / exact - 1.0)) > 0.03
    assert server.instruments["switch"].closings[PROBE_RELAY] == 0
    assert not (outcome.run_dir / "calibration.csv").exists()


def test_relay_calibration_stores_the_mismatch_and_divides_it_out(tmp_path, start_sim_bench
                                                                  ) -> None:
    """(b) calibrate_channels with switch: relay joins the probes through relay 2,
    stores m(f) in calibration.csv, separates the probes, and the sweep's H is exact."""
    server = _serve(start_sim_bench, **MISMATCH)
    bench_path = _bench_file(tmp_path, server.resources)
    procedure = _procedure_file(
        tmp_path, "  - kind: calibrate_channels\n    switch: relay\n"
        "  - kind: sweep\n" + SWEEP_KEYS)
    outcome = run_procedure(procedure, bench_path, _options(tmp_path))
    assert outcome.status == "complete"
    cal_f, cal_m = read_calibration(outcome.run_dir)
    # the next sweep's plan: 100 Hz .. 20 kHz at 3 per decade (the stop included)
    np.testing.assert_allclose(cal_f, [*np.logspace(2, 4, 7), 20e3])
    assert _relative_error(cal_m, server.bench.channel2_mismatch(cal_f)) < RELATIVE_TOLERANCE
    f, h = _sweep_h(outcome.run_dir, 1)
    np.testing.assert_allclose(f, cal_f)
    assert _relative_error(h, server.bench.exact_response(f)) < RELATIVE_TOLERANCE
    # the relay joined the probes once and left them apart
    assert server.instruments["switch"].closings[PROBE_RELAY] == 1
    assert server.bench.probes_joined is False
    traffic = (outcome.run_dir / "traffic.log").read_text().splitlines()
    relay_writes = [line.split("\t")[3] for line in traffic
                    if line.split("\t")[2] == "write" and "ROUT:" in line]
    assert relay_writes[:2] == ["ROUT:CLOS 2", "ROUT:OPEN 2"]
    manifest = json.loads((outcome.run_dir / "manifest.json").read_text())
    assert manifest["calibration"] == "calibration.csv"


def test_resume_reuses_the_stored_calibration(tmp_path, start_sim_bench) -> None:
    """(c) A run stopped after its calibration and first sweep resumes without joining
    the probes again: calibration.csv is read back and divided out of the rest."""
    server = _serve(start_sim_bench, **MISMATCH)
    relay = server.instruments["switch"]
    bench_path = _bench_file(tmp_path, server.resources)
    procedure = _procedure_file(
        tmp_path, "  - kind: calibrate_channels\n    switch: relay\n"
        "  - kind: sweep\n" + SWEEP_KEYS
        + "  - kind: prompt\n    text: Move the injection transformer.\n"
        "  - kind: sweep\n" + SWEEP_KEYS)  # same plan: no interpolation of the mismatch

    def stop_at_prompt(_text: str) -> str:
        raise KeyboardInterrupt

    first = run_procedure(procedure, bench_path, _options(tmp_path, input_fn=stop_at_prompt))
    assert first.status == "aborted"
    assert relay.closings[PROBE_RELAY] == 1
    stored = (first.run_dir / "calibration.csv").read_bytes()
    plans = [frequency_plan(step) for step in load_procedure(procedure).steps
             if step.kind == "sweep"]
    assert len(load_run(first.run_dir).points) == plans[0].size

    resumed = run_procedure(procedure, bench_path,
                            _options(tmp_path, resume=first.run_dir, input_fn=lambda _t: ""))
    assert resumed.status == "complete" and resumed.run_dir == first.run_dir
    assert relay.closings[PROBE_RELAY] == 1          # no second calibration
    assert (first.run_dir / "calibration.csv").read_bytes() == stored
    traffic = (first.run_dir / "traffic.log").read_text()
    assert traffic.count("\twrite\tROUT:CLOS 2") == 1
    points = load_run(first.run_dir).points
    # the first sweep not measured again, none lost
    assert len(points) == plans[0].size + plans[1].size
    for step, plan in zip((1, 3), plans, strict=True):
        np.testing.assert_allclose(np.sort(_sweep_h(first.run_dir, step)[0]), plan)
    for step in (1, 3):
        f, h = _sweep_h(first.run_dir, step)
        assert _relative_error(h, server.bench.exact_response(f)) < RELATIVE_TOLERANCE


def test_relay_calibration_refused_without_a_switch(tmp_path, start_sim_bench) -> None:
    """(d) switch: relay on a bench without a switch is refused before anything is sent,
    naming the procedure file, line and field."""
    server = _serve(start_sim_bench, **MISMATCH)
    bench_path = _bench_file(tmp_path, server.resources, switch=False)
    procedure = _procedure_file(
        tmp_path, "  - kind: sweep\n" + SWEEP_KEYS
        + "  - kind: calibrate_channels\n    amplitude_vpp: 0.2\n    start_hz: 100\n"
        "    stop_hz: 1000\n    count: 3\n    switch: relay\n")
    with pytest.raises(InputError) as caught:
        check_against_bench(load_procedure(procedure), load_bench(bench_path))
    line = procedure.read_text().splitlines().index("    switch: relay") + 1
    assert f"{procedure}:{line}: steps[1].switch:" in str(caught.value)
    assert "switch: relay needs a 'switch'" in str(caught.value)
    with pytest.raises(InputError):
        run_procedure(procedure, bench_path, _options(tmp_path))
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())
    assert server.bench.generator.output_on is False


def test_prompt_is_the_default_and_text_belongs_to_it(tmp_path) -> None:
    """The calibrate step keeps its operator prompt unless told otherwise; a prompt
    text on a relay calibration is refused with its line."""
    default = _procedure_file(tmp_path, "  - kind: calibrate_channels\n"
                              "    text: Both probes on the injection point.\n"
                              "  - kind: sweep\n" + SWEEP_KEYS, name="default")
    assert load_procedure(default).steps[0].switch == "prompt"
    wrong = _procedure_file(tmp_path, "  - kind: calibrate_channels\n    switch: relay\n"
                            "    text: Both probes on the injection point.\n"
                            "  - kind: sweep\n" + SWEEP_KEYS, name="wrong")
    with pytest.raises(InputError, match=r"wrong\.yaml:\d+: steps\[0\].*text applies to"):
        load_procedure(wrong)


def test_relay_calibration_needs_a_switch_that_can_join_probes(tmp_path, start_sim_bench
                                                               ) -> None:
    """A switch whose driver has no probe commands fails the run with the reason in the
    manifest; nothing was joined and the generator output is off."""
    server = _serve(start_sim_bench, **MISMATCH)
    drivers = tmp_path / "drivers"
    drivers.mkdir()
    shipped = Path(__file__).resolve().parents[1] / "drivers" / "switch-relay.yaml"
    kept = [line for line in shipped.read_text().splitlines()
            if "probes" not in line.split(":")[0]]
    (drivers / "relay-loop-only.yaml").write_text(
        "\n".join(kept).replace("name: switch-relay", "name: relay-loop-only") + "\n")
    bench_path = _bench_file(tmp_path, server.resources)
    bench_path.write_text(bench_path.read_text().replace(
        f"  resource: '{server.resources['switch']}'\n",
        f"  resource: '{server.resources['switch']}'\n  driver: relay-loop-only\n"))
    procedure = _procedure_file(
        tmp_path, "  - kind: calibrate_channels\n    switch: relay\n"
        "  - kind: sweep\n" + SWEEP_KEYS)
    with pytest.raises(RunError, match="run failed"):
        run_procedure(procedure, bench_path,
                      _options(tmp_path, extra_driver_dirs=(drivers,)))
    (run_dir,) = (tmp_path / "runs").iterdir()
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert manifest["status"] == "failed"
    assert "can join the probes" in manifest["reason"]
    assert server.instruments["switch"].closings[PROBE_RELAY] == 0
    assert server.bench.generator.output_on is False
    assert not (run_dir / "calibration.csv").exists()
