"""Reanalysis: a stored run's points recomputed from its raw captures.

The source run is made here by the real runner on the simulated bench (the invented
``rational`` loop, 0.5 mV rms noise per channel) with ``keep_captures: true``.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from loopwright.cli import main
from loopwright.dsp import estimate_point
from loopwright.procedure.reanalyze import reanalyze_run
from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.store import load_run
from loopwright.store.writer import RunFolder

PROCEDURE = """\
name: kept-records
sign: 1
method: broken_loop
limits:
  - name: phase margin
    figure: phase_margin_deg
    min: 40
steps:
  - kind: sweep
    start_hz: 300.0
    stop_hz: 1.0e5
    points_per_decade: 6
    amplitude_vpp: 0.2
    settle_cycles: 30
    cycles_per_record: 10
    min_samples: 2048
    estimator: sinefit
    keep_captures: true
"""

BENCH = """\
simulated:
  dut: rational
  noise_v_rms: 0.0005
  seed: 21
max_amplitude_vpp: 2.0
max_frequency_hz: 2.0e7
"""

NUMERIC = ["gain_db", "phase_deg", "gain_re", "gain_im", "gain_db_std", "phase_deg_std",
           "reference_amplitude_v", "response_amplitude_v", "reference_snr_db",
           "response_snr_db", "reference_thd_pct", "response_thd_pct", "sample_rate_hz",
           "record_length", "averages"]


def tree_hashes(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def source(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("kept")
    (folder / "p.yaml").write_text(PROCEDURE)
    (folder / "b.yaml").write_text(BENCH)
    outcome = run_procedure(folder / "p.yaml", folder / "b.yaml",
                            RunOptions(out_dir=folder / "runs", serial="R3", quiet=True,
                                       render_report=False))
    assert outcome.status == "complete"
    return outcome.run_dir


def points_text(run_dir: Path) -> list[list[str]]:
    return [line.split(",") for line in (run_dir / "points.csv").read_text().splitlines()]


def test_same_settings_reproduce_every_point_bit_for_bit(source, tmp_path) -> None:
    before = tree_hashes(source)
    outcome = reanalyze_run(source, out_dir=tmp_path, render_report=False)
    assert tree_hashes(source) == before, "the source run folder changed"
    # points.csv holds floats as repr(): equal text is equal bits, for every column
    assert points_text(outcome.run_dir) == points_text(source)
    a, b = load_run(source).points, load_run(outcome.run_dir).points
    assert np.array_equal(a["gain_re"].to_numpy(), b["gain_re"].to_numpy())
    assert np.array_equal(a["gain_im"].to_numpy(), b["gain_im"].to_numpy())
    stored = json.loads((source / "summary.json").read_text())
    assert outcome.summary["analysis"] == stored["analysis"]
    assert outcome.summary["verdict"] == stored["verdict"]
    assert outcome.summary["limits"] == stored["limits"]
    manifest = json.loads((outcome.run_dir / "manifest.json").read_text())
    assert manifest["reanalysis_of"] == str(source.resolve())
    assert manifest["status"] == "complete"
    assert manifest["reanalysis"]["not_recomputed"] == []
    assert len(manifest["reanalysis"]["recomputed"]) == len(a)


def test_a_point_against_the_estimator_directly(source) -> None:
    """The stored gain is the estimator's ratio of the stored record (sign +1, no
    calibration): a check that the capture is the record the point came from."""
    row = load_run(source).points.iloc[4]
    with np.load(source / "captures" / f"point_{int(row['index']):05d}.npz") as data:
        estimate = estimate_point(data["reference_v"], data["response_v"],
                                  float(data["sample_rate_hz"]), float(data["frequency_hz"]),
                                  method="sinefit")
    assert estimate.gain == complex(row["gain_re"], row["gain_im"])


def test_other_estimator_gives_consistent_points(source, tmp_path) -> None:
    outcome = reanalyze_run(source, estimator="dft", out_dir=tmp_path, render_report=False)
    a, b = load_run(source).points, load_run(outcome.run_dir).points
    assert not np.array_equal(a["gain_re"].to_numpy(), b["gain_re"].to_numpy())
    # two estimators on the same record: within 5 sigma of the record's own noise
    d_gain = np.abs(a["gain_db"] - b["gain_db"]) / a["gain_db_std"]
    d_phase = np.abs(a["phase_deg"] - b["phase_deg"]) / a["phase_deg_std"]
    assert d_gain.max() < 5 and d_phase.max() < 5
    manifest = json.loads((outcome.run_dir / "manifest.json").read_text())
    assert manifest["reanalysis"]["estimator"] == "dft"
    pm_a = json.loads((source / "summary.json").read_text())["analysis"]
    pm_b = outcome.summary["analysis"]
    assert abs(pm_a["phase_margin_deg"] - pm_b["phase_margin_deg"]) < 3 * pm_a[
        "phase_margin_deg_std"]


def test_points_without_capture_are_copied_and_listed(source, tmp_path) -> None:
    partial = tmp_path / "partial"
    shutil.copytree(source, partial)
    for index in (2, 7):
        (partial / "captures" / f"point_{index:05d}.npz").unlink()
    outcome = reanalyze_run(partial, out_dir=tmp_path / "out", render_report=False)
    assert outcome.not_recomputed == [2, 7]
    manifest = json.loads((outcome.run_dir / "manifest.json").read_text())
    assert manifest["reanalysis"]["not_recomputed"] == [2, 7]
    assert "2 without a capture copied as stored (not recomputed)" in manifest[
        "reanalysis"]["note"]
    assert points_text(outcome.run_dir) == points_text(partial)


def test_sign_and_calibration_applied_like_the_runner(source, tmp_path) -> None:
    """The same records with a stored sign of -1 and an (invented, flat) mismatch of
    -0.7 dB / +4 deg: every point becomes -H / m."""
    crafted = tmp_path / "crafted"
    shutil.copytree(source, crafted)
    manifest = json.loads((crafted / "manifest.json").read_text())
    procedure = dict(manifest["procedure"], sign=-1)
    mismatch = 10 ** (-0.7 / 20) * np.exp(1j * np.deg2rad(4.0))
    folder = RunFolder(crafted, manifest)
    folder.update_manifest(procedure=procedure)
    folder.write_calibration([10.0, 1e7], [mismatch, mismatch])
    outcome = reanalyze_run(crafted, out_dir=tmp_path / "out", render_report=False)
    a, b = load_run(source).points, load_run(outcome.run_dir).points
    h_a = a["gain_re"].to_numpy() + 1j * a["gain_im"].to_numpy()
    h_b = b["gain_re"].to_numpy() + 1j * b["gain_im"].to_numpy()
    cal_m = load_run(outcome.run_dir).calibration[1][0]
    np.testing.assert_allclose(h_b, -h_a / cal_m, rtol=1e-12)
    assert (outcome.run_dir / "calibration.csv").read_bytes() == (
        crafted / "calibration.csv").read_bytes()


def test_averaged_points_are_recomputed_from_their_last_record(tmp_path) -> None:
    """Averaging keeps only the last record: the reanalysis says so, and the point it
    gives is that record's estimate (within 5 sigma of the stored two-record mean)."""
    text = PROCEDURE.replace("points_per_decade: 6", "points_per_decade: 2").replace(
        "    keep_captures: true", "    averages: 2\n    keep_captures: true")
    (tmp_path / "p.yaml").write_text(text)
    (tmp_path / "b.yaml").write_text(BENCH)
    source = run_procedure(tmp_path / "p.yaml", tmp_path / "b.yaml",
                           RunOptions(out_dir=tmp_path / "runs", serial="A2", quiet=True,
                                      render_report=False)).run_dir
    outcome = reanalyze_run(source, out_dir=tmp_path / "out", render_report=False)
    a, b = load_run(source).points, load_run(outcome.run_dir).points
    assert (a["averages"] == 2).all() and (b["averages"] == 1).all()
    assert outcome.single_record == a["index"].tolist()
    manifest = json.loads((outcome.run_dir / "manifest.json").read_text())
    assert manifest["reanalysis"]["single_record"] == a["index"].tolist()
    assert "from their last record only" in manifest["reanalysis"]["note"]
    # a lone record's std is sqrt(2) times the two-record mean's
    assert np.all(np.abs(a["phase_deg"] - b["phase_deg"]) < 5 * b["phase_deg_std"])


def test_report_is_rendered(source, tmp_path) -> None:
    pytest.importorskip("loopwright.report")
    outcome = reanalyze_run(source, out_dir=tmp_path)
    assert (outcome.run_dir / "report.html").exists()
    assert "re-analysis of" in (outcome.run_dir / "report.html").read_text()


def test_cli_reanalyze(source, tmp_path, capsys) -> None:
    assert main(["reanalyze", str(source), "--out", str(tmp_path), "--no-report"]) == 0
    out = capsys.readouterr().out
    assert "recomputed" in out and "phase margin" in out


@pytest.mark.parametrize("case", ["not_a_run", "no_points", "no_captures"])
def test_cli_reanalyze_bad_input(case, source, tmp_path, capsys) -> None:
    target = tmp_path / "t"
    if case == "not_a_run":
        target.mkdir()
    else:
        shutil.copytree(source, target)
        if case == "no_points":
            header = (target / "points.csv").read_text().splitlines()[0]
            (target / "points.csv").write_text(header + "\n")
        else:
            shutil.rmtree(target / "captures")
    assert main(["reanalyze", str(target), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("loopwright: error:") and "\n" not in err
    assert {"not_a_run": "not a run folder", "no_points": "no points",
            "no_captures": "keep_captures: true"}[case] in err
    assert not (tmp_path / "o").exists()


def test_cli_reanalyze_damaged_capture(source, tmp_path, capsys) -> None:
    """A truncated .npz (a damaged zip archive) is our one-line error, exit 2."""
    target = tmp_path / "t"
    shutil.copytree(source, target)
    capture = target / "captures" / "point_00003.npz"
    capture.write_bytes(capture.read_bytes()[:100])
    assert main(["reanalyze", str(target), "--out", str(tmp_path / "o"), "--no-report"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("loopwright: error:") and "\n" not in err
    assert f"{capture}: cannot read the capture" in err
