"""Replay: a stored run becomes a simulated board and procedures run against it.

The stored runs are made here by the real runner on the simulated bench (pyvisa-py
over loopback TCP). The default ``rational`` DUT is an invented third-order loop
(3 kHz real pole, 20 kHz +- j15 kHz pair, H(0) = -5); the bench adds 0.5 mV rms of
white noise per channel, which is the truth the replay's noise estimate is held to.
"""

from __future__ import annotations

import hashlib
import json
import math
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml

from loopwright.cli import main
from loopwright.procedure.replay import replay_run
from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.procedure.schema import load_procedure
from loopwright.store import load_run
from loopwright.store.load import mismatch_at
from loopwright.store.writer import RunFolder
from mock_instruments.duts import load_dut
from mock_instruments.duts.measured import (
    MeasuredResponseDUT,
    channel_noise_v_rms,
    limit_for_amplitude,
    tanh_describing_gain,
    transient_model,
)

NOISE_V_RMS = 5e-4

SWEEP = """\
  - kind: sweep
    start_hz: {start!r}
    stop_hz: {stop!r}
    points_per_decade: {ppd}
    amplitude_vpp: {amplitude}
    settle_cycles: 30
    cycles_per_record: 10
    min_samples: 2048
"""


def write_bench(folder: Path, dut: str = "rational", **params: object) -> Path:
    dut_ref = dut
    if params:
        dut_file = folder / "dut.yaml"
        dut_file.write_text(yaml.safe_dump({"model": dut, **params}))
        dut_ref = str(dut_file)
    bench = folder / "bench.yaml"
    bench.write_text(
        "simulated:\n"
        f"  dut: {dut_ref}\n"
        f"  noise_v_rms: {NOISE_V_RMS}\n"
        "  seed: 11\n"
        "max_amplitude_vpp: 2.0\n"
        "max_frequency_hz: 2.0e7\n")
    return bench


def write_procedure(folder: Path, name: str, *, sign: int = 1, start: float = 200.0,
                    stop: float = 2.0e5, ppd: int = 7, amplitude: float = 0.2) -> Path:
    path = folder / f"{name}.yaml"
    path.write_text(f"name: {name}\nsign: {sign}\nmethod: broken_loop\nsteps:\n"
                    + SWEEP.format(start=start, stop=stop, ppd=ppd, amplitude=amplitude))
    return path


def measure(procedure: Path, bench: Path, out: Path) -> Path:
    outcome = run_procedure(procedure, bench, RunOptions(out_dir=out, serial="B7", quiet=True,
                                                         render_report=False))
    assert outcome.status == "complete", outcome.reason
    return outcome.run_dir


def tree_hashes(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def source(tmp_path_factory) -> Path:
    """A stored run: 22 points, 200 Hz..200 kHz, 0.2 Vpp, noisy channels."""
    folder = tmp_path_factory.mktemp("source")
    return measure(write_procedure(folder, "loop-check"), write_bench(folder),
                   folder / "runs")


@pytest.fixture(scope="module")
def replayed(source, tmp_path_factory) -> tuple[Path, dict[str, str], dict[str, str]]:
    """The source replayed with its own procedure; hashes of the source before/after."""
    before = tree_hashes(source)
    outcome = replay_run(source, out_dir=tmp_path_factory.mktemp("replays"), seed=5,
                         render_report=False)
    assert outcome.status == "complete", outcome.reason
    return outcome.run_dir, before, tree_hashes(source)


def figures(run_dir: Path) -> dict:
    return json.loads((run_dir / "summary.json").read_text())["analysis"]


def assert_consistent(a: dict, b: dict, k: float = 1.0) -> None:
    """Phase margin, crossover, gain margin and its frequency of ``a`` lie within k
    times the stored run ``b``'s own reported one-sigma uncertainty of its figures.

    Seen: the replays land within 0.05 sigma (the replay reproduces the stored
    interpolation; only the fresh noise differs), so k = 1 leaves room without
    letting a wrong sign, mismatch or interpolation through."""
    xa, xb = a["gain_crossovers"][0], b["gain_crossovers"][0]
    za, zb = a["zero_phase_crossings"][0], b["zero_phase_crossings"][0]
    pairs = [
        (a["phase_margin_deg"], b["phase_margin_deg"],
         a["phase_margin_deg_std"], b["phase_margin_deg_std"]),
        (xa["frequency_hz"], xb["frequency_hz"], xa["frequency_hz_std"], xb["frequency_hz_std"]),
        (a["gain_margin_db"], b["gain_margin_db"],
         a["gain_margin_db_std"], b["gain_margin_db_std"]),
        (za["frequency_hz"], zb["frequency_hz"], za["frequency_hz_std"], zb["frequency_hz_std"]),
    ]
    for got, want, _, stored_std in pairs:
        assert abs(got - want) <= k * stored_std, (got, want, stored_std)


# --------------------------------------------------------------------------- the board


def test_board_passes_through_the_stored_points(source) -> None:
    run = load_run(source)
    board = MeasuredResponseDUT.from_run(source)
    response = run.response
    got = board.loop_response(response.frequency_hz)
    tolerance = 1e-12 if board.model_method == "pchip" else 1e-3  # AAA: held-out bound
    assert np.max(np.abs(got / response.h - 1)) <= tolerance
    # between the points: the analysis model itself
    mid = np.sqrt(response.frequency_hz[:-1] * response.frequency_hz[1:])
    np.testing.assert_allclose(board.loop_response(mid), response.interpolate(mid), rtol=1e-12)
    # outside the stored range the end values are held
    lo, hi = response.frequency_hz[0], response.frequency_hz[-1]
    np.testing.assert_allclose(board.loop_response([lo / 10, hi * 10]),
                               [response.h[0], response.h[-1]], rtol=1e-12)


def test_noise_estimate_recovers_the_bench_noise(source) -> None:
    """The bench added 0.5 mV rms to each channel; SNR = A^2/2 / sigma^2 for a sine
    (IEEE Std 1057 (mem)) gives it back from the stored points within 10 %."""
    board = MeasuredResponseDUT.from_run(source)
    for level in board.channel_noise_v_rms:
        assert level == pytest.approx(NOISE_V_RMS, rel=0.1)


def test_noise_formula_on_known_numbers() -> None:
    # A = 1 V, SNR 60 dB -> sigma = 1/sqrt(2)/1000; quantisation of 1 mV/div at 12 bits
    # is (8e-3/4096)^2/12, taken out in quadrature
    sigma = channel_noise_v_rms(np.array([1.0, 1.0, 1.0]), np.array([60.0, 60.0, 60.0]))
    assert sigma == pytest.approx(1 / math.sqrt(2) / 1000, rel=1e-12)
    with_adc = channel_noise_v_rms(np.array([1.0]), np.array([60.0]), np.array([1e-3]))
    q2 = (8e-3 / 4096) ** 2 / 12
    assert with_adc == pytest.approx(math.sqrt(0.5e-6 - q2), rel=1e-12)


def test_transient_model_recovers_exact_poles() -> None:
    """From exact samples of a known rational loop the fitted poles are the loop's own
    (scipy's AAA on the mirrored data, Nakatsukasa-Sete-Trefethen 2018)."""
    dut = load_dut("rational")
    f = np.geomspace(200.0, 2e5, 22)
    model, note = transient_model(f, dut.loop_response(f))
    assert model is not None, note
    want = np.sort_complex(dut.transfer_function().poles())
    np.testing.assert_allclose(np.sort_complex(model.poles()), want, rtol=1e-6)
    np.testing.assert_allclose(model.at_hz(f), dut.loop_response(f), rtol=1e-8)


def test_board_settles_with_the_loop_own_time_constants(source) -> None:
    """From the noisy stored run the board's transient model keeps the loop's three
    modes (3 kHz real pole, 20 kHz +- j15 kHz pair) and drops noise-fitted ones: its
    time constants match the DUT's own within 2 %."""
    board = MeasuredResponseDUT.from_run(source)
    want = load_dut("rational").time_constants_s()
    got = board.time_constants_s()
    assert got.size == want.size, board.transient_note
    np.testing.assert_allclose(got, want, rtol=0.02)


def test_transient_model_is_stable_or_absent_on_noisy_data() -> None:
    dut = load_dut("rational")
    f = np.geomspace(200.0, 2e5, 22)
    rng = np.random.default_rng(4)
    for _ in range(5):
        h = dut.loop_response(f) * (1 + 3e-3 * (rng.normal(size=f.size)
                                                + 1j * rng.normal(size=f.size)))
        model, note = transient_model(f, h)
        if model is None:
            assert "steady state only" in note
        else:
            assert np.all(model.poles().real < 0)
            assert np.sqrt(np.mean(np.abs(model.at_hz(f) / h - 1) ** 2)) <= 0.05


def test_dut_file_loads_the_board(source, tmp_path) -> None:
    dut_file = tmp_path / "board.yaml"
    dut_file.write_text(f"model: measured_response\nrun: {source}\n")
    board = load_dut(dut_file)
    assert isinstance(board, MeasuredResponseDUT)
    bad = tmp_path / "bad.yaml"
    bad.write_text(f"model: measured_response\nrun: {tmp_path}\n")
    with pytest.raises(Exception, match=r"bad\.yaml:2: run: cannot replay"):
        load_dut(bad)


# --------------------------------------------------------------------------- replay runs


def test_replay_reproduces_the_stored_figures(source, replayed) -> None:
    run_dir, _, _ = replayed
    stored, again = figures(source), figures(run_dir)
    assert stored["phase_margin_deg"] is not None and stored["gain_margin_db"] is not None
    assert_consistent(again, stored)


def test_replayed_points_agree_with_stored_points(source, replayed) -> None:
    """Same frequencies: each replayed point within 4 combined sigma of the stored one
    (each run has its own noise), at least 90 % of them."""
    run_dir, _, _ = replayed
    a, b = load_run(source).points, load_run(run_dir).points
    np.testing.assert_array_equal(a["frequency_hz"], b["frequency_hz"])
    d_gain = np.abs(a["gain_db"] - b["gain_db"]) / np.hypot(a["gain_db_std"], b["gain_db_std"])
    d_phase = np.abs((a["phase_deg"] - b["phase_deg"] + 180) % 360 - 180) / np.hypot(
        a["phase_deg_std"], b["phase_deg_std"])
    assert np.mean(d_gain <= 4) >= 0.9 and np.mean(d_phase <= 4) >= 0.9


def test_replay_manifest_and_files(source, replayed) -> None:
    run_dir, before, after = replayed
    assert before == after, "the source run folder changed"
    manifest = json.loads((run_dir / "manifest.json").read_text())
    src_manifest = json.loads((source / "manifest.json").read_text())
    assert manifest["replay_of"] == str(source.resolve())
    assert manifest["replay_source_procedure_sha256"] == src_manifest["procedure_sha256"]
    assert manifest["simulated"] is True and manifest["status"] == "complete"
    assert manifest["procedure"] == src_manifest["procedure"]
    kept = run_dir / "replay"
    assert manifest["procedure_file"] == str(kept / "procedure.yaml")
    assert load_procedure(kept / "procedure.yaml").record() == src_manifest["procedure"]
    board = manifest["replay_board"]
    assert board["frequency_range_hz"] == [200.0, 200000.0]
    assert board["outside_range"] == "end values held"
    assert (kept / "dut.yaml").exists() and (kept / "bench.yaml").exists()


def test_denser_plan_other_amplitude_on_the_replayed_board(source, tmp_path) -> None:
    """A different procedure (15 points per decade over 300 Hz..100 kHz at 0.5 Vpp)
    against the replayed board gives figures consistent with the stored run."""
    procedure = write_procedure(tmp_path, "dense", start=300.0, stop=1.0e5, ppd=15,
                                amplitude=0.5)
    outcome = replay_run(source, procedure=procedure, out_dir=tmp_path / "out", seed=2,
                         render_report=False)
    assert outcome.status == "complete"
    assert len(load_run(outcome.run_dir).points) == 39
    assert_consistent(figures(outcome.run_dir), figures(source))
    # 2.5x the amplitude against the same absolute noise: a cleaner measurement
    snr_src = np.median(load_run(source).points["response_snr_db"])
    snr_new = np.median(load_run(outcome.run_dir).points["response_snr_db"])
    assert snr_new > snr_src + 4


def test_sign_is_undone_and_applied_again(tmp_path) -> None:
    """A loop probed without its inversion (H(0) = +5, procedure sign -1) stores the
    same H as the default loop; its replay reproduces the figures."""
    source = measure(write_procedure(tmp_path, "flipped", sign=-1),
                     write_bench(tmp_path, "rational", dc_gain=5.0), tmp_path / "runs")
    board = MeasuredResponseDUT.from_run(source)
    response = load_run(source).response
    f = response.frequency_hz
    np.testing.assert_allclose(board.loop_response(f), -response.interpolate(f), rtol=1e-12)
    outcome = replay_run(source, out_dir=tmp_path / "out", seed=9, render_report=False)
    assert_consistent(figures(outcome.run_dir), figures(source))


def test_stored_mismatch_on_the_response_channel(source, tmp_path) -> None:
    """A run corrected by a channel calibration (invented: +0.4 dB, -3 deg, flat) is
    replayed with the mismatch on the response channel: a procedure with a calibrate
    step is given the stored calibration and reproduces H; one without sees H * m."""
    crafted = tmp_path / "with-cal"
    shutil.copytree(source, crafted)
    manifest = json.loads((crafted / "manifest.json").read_text())
    procedure = manifest["procedure"]
    procedure["steps"] = [{"kind": "calibrate_channels", "text": "Both probes on the input."}
                          ] + procedure["steps"]
    mismatch = 10 ** (0.4 / 20) * np.exp(-1j * np.deg2rad(3.0))
    folder = RunFolder(crafted, manifest)
    folder.update_manifest(procedure=procedure)
    folder.write_calibration([100.0, 1e6], [mismatch, mismatch])
    board = MeasuredResponseDUT.from_run(crafted)
    response = load_run(crafted).response
    np.testing.assert_allclose(board.loop_response(response.frequency_hz),
                               response.interpolate(response.frequency_hz) * mismatch,
                               rtol=1e-12)
    with_cal = replay_run(crafted, out_dir=tmp_path / "a", seed=3, render_report=False)
    cal_f, cal_m = load_run(with_cal.run_dir).calibration
    np.testing.assert_allclose(cal_m, mismatch, rtol=1e-15)
    assert "copied" in json.loads((with_cal.run_dir / "manifest.json").read_text())[
        "replay_calibration"]
    assert_consistent(figures(with_cal.run_dir), figures(source))
    plain = write_procedure(tmp_path, "plain")
    without = replay_run(crafted, procedure=plain, out_dir=tmp_path / "b", seed=3,
                         render_report=False)
    h_new = load_run(without.run_dir).response.h
    ratio = h_new / response.h
    assert np.median(20 * np.log10(np.abs(ratio))) == pytest.approx(0.4, abs=0.05)
    assert np.median(np.degrees(np.angle(ratio))) == pytest.approx(-3.0, abs=0.3)
    assert abs(mismatch_at(1e3, cal_f, cal_m) - mismatch) < 1e-12


OSCILLATOR = """\
name: tank-start
sign: 1
method: broken_loop
steps:
  - kind: sweep
    spacing: log
    start_hz: 0.8e6
    stop_hz: 2.8e6
    count: 21
    amplitude_vpp: 0.1
    settle_cycles: 200
    cycles_per_record: 40
    min_samples: 4096
    refine:
      max_extra_points: 10
      max_phase_step_deg: 8
      near_crossings: true
  - kind: closed_loop_check
    switch: relay
    settle_s: 0.2
    record_cycles: 100
"""


def test_describing_gain_of_the_soft_limiter() -> None:
    """tanh(x) = x - x^3/3 + ... gives N(a) = 1 - a^2/4 for small a; large a tends to
    the ideal limiter's 4/(pi a) (Gelb & Vander Velde (mem))."""
    assert tanh_describing_gain(1e-2) == pytest.approx(1 - 1e-4 / 4, rel=1e-9)
    assert tanh_describing_gain(200.0) == pytest.approx(4 / math.pi / 200, rel=1e-3)
    limit = limit_for_amplitude(0.7, 2.0)
    assert tanh_describing_gain(0.7 / limit) == pytest.approx(0.5, rel=1e-9)
    assert limit_for_amplitude(0.7, 0.9) is None


def test_oscillator_replay_reproduces_start_up_figures(tmp_path) -> None:
    """An LC oscillator (invented tank near 1.49 MHz, shipped lc_oscillator model):
    the replay's oscillation frequency and excess gain agree within 3 combined sigma,
    its closed loop oscillates at the stored frequency within 3 sigma of the predicted
    one, and at the stored amplitude within 5 % (the describing function ignores the
    harmonics, which the tank keeps small)."""
    (tmp_path / "osc.yaml").write_text(OSCILLATOR)
    bench = tmp_path / "bench.yaml"
    bench.write_text("simulated:\n  dut: lc_oscillator\n  noise_v_rms: 0.0002\n"
                     "  seed: 5\nmax_amplitude_vpp: 1.0\nmax_frequency_hz: 5.0e6\n")
    source = measure(tmp_path / "osc.yaml", bench, tmp_path / "runs")
    outcome = replay_run(source, out_dir=tmp_path / "out", seed=8, render_report=False)
    stored = json.loads((source / "summary.json").read_text())
    again = outcome.summary
    a, b = stored["analysis"], again["analysis"]
    za, zb = a["zero_phase_crossings"][0], b["zero_phase_crossings"][0]
    assert a["oscillation_predicted"] and b["oscillation_predicted"]
    assert abs(a["oscillation_frequency_hz"] - b["oscillation_frequency_hz"]) <= 3 * math.hypot(
        za["frequency_hz_std"], zb["frequency_hz_std"])
    assert abs(a["excess_gain"] - b["excess_gain"]) <= 3 * math.hypot(
        za["loop_gain_std"], zb["loop_gain_std"])
    ca, cb = stored["closed_loop"], again["closed_loop"]
    assert ca["oscillating"] and cb["oscillating"]
    assert abs(ca["frequency_hz"] - cb["frequency_hz"]) <= 3 * za["frequency_hz_std"]
    assert cb["amplitude_v"] == pytest.approx(ca["amplitude_v"], rel=0.05)


def test_stored_prompt_switch_becomes_the_simulated_relay(source, tmp_path) -> None:
    from loopwright.procedure.replay import _stored_procedure_text
    from loopwright.procedure.schema import loads_procedure

    crafted = tmp_path / "prompted"
    shutil.copytree(source, crafted)
    manifest = json.loads((crafted / "manifest.json").read_text())
    procedure = manifest["procedure"]
    procedure["steps"].append({"kind": "closed_loop_check", "switch": "prompt",
                               "close_text": "Fit the loop link.", "expected_frequency_hz":
                               1000.0})
    RunFolder(crafted, manifest).update_manifest(procedure=procedure)
    text, changes = _stored_procedure_text(load_run(crafted))
    step = loads_procedure(text).steps[-1]
    assert step.switch == "relay" and step.close_text is None
    assert changes == ["step 2: switch prompt -> relay (the simulated loop switch)"]


# --------------------------------------------------------------------------- CLI


def test_cli_replay(source, tmp_path, capsys) -> None:
    assert main(["replay", str(source), "--out", str(tmp_path), "--seed", "4", "--quiet",
                 "--no-report"]) == 0
    out = capsys.readouterr().out
    assert "run complete" in out
    (run_dir,) = tmp_path.iterdir()
    assert json.loads((run_dir / "manifest.json").read_text())["replay_of"] == str(
        source.resolve())


@pytest.mark.parametrize("case", ["not_a_folder", "not_a_run", "no_points"])
def test_cli_replay_bad_input(case, source, tmp_path, capsys) -> None:
    if case == "not_a_folder":
        target = tmp_path / "missing"
    elif case == "not_a_run":
        target = tmp_path
    else:
        target = tmp_path / "empty-run"
        shutil.copytree(source, target)
        header = (target / "points.csv").read_text().splitlines()[0]
        (target / "points.csv").write_text(header + "\n")
    assert main(["replay", str(target), "--out", str(tmp_path / "o"), "--no-report"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("loopwright: error:") and "\n" not in err
    assert {"not_a_folder": "not a folder", "not_a_run": "not a run folder",
            "no_points": "no points"}[case] in err
