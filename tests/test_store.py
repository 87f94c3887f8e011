"""The run folder: names, durable appends, atomic rewrites, resume after a kill, loading."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from loopwright.errors import InputError, RunError
from loopwright.store import (
    POINT_COLUMNS,
    RunFolder,
    load_run,
    mismatch_at,
    read_calibration,
    safe_part,
)
from loopwright.store import writer as writer_module

MOMENT = datetime(2026, 3, 4, 5, 6, 7, tzinfo=timezone.utc)


def _h(frequency_hz):
    """An invented second-order loop for the round trips."""
    s = 2j * np.pi * np.asarray(frequency_hz)
    return -(2e4 / s) / (1 + s / (2 * np.pi * 3e4))


def _row(i: int, f: float, **extra) -> dict:
    h = complex(_h(f))
    row = {"step": 1, "frequency_hz": f, "amplitude_vpp": 0.2,
           "gain_db": 20 * np.log10(abs(h)), "phase_deg": float(np.degrees(np.angle(h))),
           "gain_re": h.real, "gain_im": h.imag, "gain_db_std": 0.01, "phase_deg_std": 0.05,
           "reference_amplitude_v": 0.1, "response_amplitude_v": 0.1 * abs(h),
           "reference_snr_db": 60.0, "response_snr_db": 55.5, "reference_thd_pct": 0.1,
           "response_thd_pct": 0.2, "reference_scale_v_per_div": 0.05,
           "response_scale_v_per_div": 0.2, "sample_rate_hz": 1e6, "record_length": 4096,
           "averages": 2}
    row.update(extra)
    return row


def _new(tmp_path: Path, **manifest) -> RunFolder:
    return RunFolder.create(tmp_path / "runs", "loop check", "SN-001",
                            {"operator": "tester", "procedure": {"name": "loop check",
                                                                 "sign": 1}, **manifest},
                            now=MOMENT)


# ---------------------------------------------------------------------- names


@pytest.mark.parametrize(("text", "expected"), [
    ("../x", "_x"),
    ("a/b", "a_b"),
    ("..", "unnamed"),
    ("", "unnamed"),
    ("   ", "unnamed"),
    ("a\x00b\nc\x1b", "a_b_c_"),
    ("Ωmega-7.rev_B", "_mega-7.rev_B"),
    (".hidden", "hidden"),
    ("C:\\boards\\7", "C__boards_7"),
    ("x" * 100, "x" * 64),
])
def test_safe_part(text, expected):
    assert safe_part(text) == expected


@pytest.mark.parametrize(("name", "serial"), [("../../etc", "../x"), ("a/b", "/abs/path"),
                                               ("", "\x00"), ("ok", "..")])
def test_folder_stays_inside_root(tmp_path, name, serial):
    folder = RunFolder.create(tmp_path / "runs", name, serial, {}, now=MOMENT)
    assert folder.path.parent == tmp_path / "runs"
    assert folder.path.name.startswith("20260304T050607Z_")
    assert set(folder.path.name) <= set(
        "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789._-")


def test_create_writes_manifest_and_unique_names(tmp_path):
    first = _new(tmp_path)
    second = _new(tmp_path)
    assert first.path.name == "20260304T050607Z_loop_check_SN-001"
    assert second.path.name == "20260304T050607Z_loop_check_SN-001-2"
    manifest = json.loads((first.path / "manifest.json").read_text())
    assert manifest["format"] == "loopwright-run/1"
    assert manifest["status"] == "running" and manifest["reason"] is None
    assert manifest["serial"] == "SN-001" and manifest["operator"] == "tester"
    assert manifest["started_utc"] == "2026-03-04T05:06:07.000000Z"
    for key in ("software_version", "host", "replay_of", "reanalysis_of", "calibration",
                "ended_utc", "instruments"):
        assert key in manifest
    assert first.traffic_log_path == first.path / "traffic.log"


# ---------------------------------------------------------------------- points


def test_append_writes_header_once_and_fsyncs_each_point(tmp_path, monkeypatch):
    synced: list[int] = []
    real_fsync = os.fsync

    def counting_fsync(fd):
        synced.append(fd)
        real_fsync(fd)

    monkeypatch.setattr(writer_module.os, "fsync", counting_fsync)
    folder = _new(tmp_path)
    frequencies = [100.0, 1000.0 / 3, 1e4]
    for i, f in enumerate(frequencies):
        before = len(synced)
        assert folder.append_point(_row(i, f, flags=["low_snr", "clipped"])) == i
        assert len(synced) > before                 # this point was fsynced
        # visible to another reader at once (flushed), whole rows only
        lines = (folder.path / "points.csv").read_text().splitlines()
        assert lines[0] == ",".join(POINT_COLUMNS)
        assert len(lines) == i + 2
    folder.close()
    run = load_run(folder.path)
    assert list(run.points.columns) == list(POINT_COLUMNS)
    assert run.points["frequency_hz"].tolist() == frequencies     # exact round trip
    assert run.points["flags"].tolist() == ["clipped;low_snr"] * 3   # canonical order
    assert run.points["index"].tolist() == [0, 1, 2]
    assert run.points["refined"].tolist() == [0, 0, 0]


def test_append_refuses_unknown_columns_and_flags(tmp_path):
    folder = _new(tmp_path)
    with pytest.raises(RunError, match="no column 'gain'"):
        folder.append_point({"step": 0, "frequency_hz": 1.0, "gain": 1})
    with pytest.raises(RunError, match="unknown point flag 'bad'"):
        folder.append_point({"step": 0, "frequency_hz": 1.0, "flags": "bad"})
    folder.close()
    assert not (folder.path / "points.csv").exists() or load_run(folder.path).points.empty


def _write_points(folder: RunFolder, count: int) -> list[float]:
    frequencies = list(np.geomspace(100, 1e5, count))
    for i, f in enumerate(frequencies):
        folder.append_point(_row(i, f, refined=i % 2 == 1))
    folder.close()
    return frequencies


def test_resume_after_torn_last_row(tmp_path):
    folder = _new(tmp_path)
    frequencies = _write_points(folder, 5)
    points = folder.path / "points.csv"
    whole = points.read_bytes()
    last_row_start = whole.rstrip(b"\n").rfind(b"\n") + 1
    torn = last_row_start + 17                      # cut the fifth row mid-line
    with open(points, "r+b") as handle:
        handle.truncate(torn)

    resumed = RunFolder.open_for_resume(folder.path)
    assert points.read_bytes() == whole[:last_row_start]     # back to the 4th row
    assert [p["index"] for p in resumed.done_points] == [0, 1, 2, 3]
    assert resumed.next_index == 4
    assert resumed.is_done(1, frequencies[3]) and not resumed.is_done(1, frequencies[4])
    assert not resumed.is_done(0, frequencies[0])
    assert [p["refined"] for p in resumed.done_points] == [0, 1, 0, 1]
    resumed.update_manifest(status="running")
    resumed.append_point(_row(4, frequencies[4]))
    resumed.finish("complete")
    run = load_run(folder.path)
    assert run.points["index"].tolist() == [0, 1, 2, 3, 4]
    assert run.points["frequency_hz"].tolist() == frequencies
    assert run.status == "complete" and run.manifest["ended_utc"]


def test_resume_with_torn_header_and_without_points(tmp_path):
    folder = _new(tmp_path)
    (folder.path / "points.csv").write_bytes(b"index,timestamp_u")
    resumed = RunFolder.open_for_resume(folder.path)
    assert resumed.done_points == [] and resumed.next_index == 0
    resumed.append_point(_row(0, 10.0))
    resumed.close()
    assert load_run(folder.path).points["frequency_hz"].tolist() == [10.0]
    other = _new(tmp_path)
    assert RunFolder.open_for_resume(other.path).done_points == []


def test_resume_refuses_complete_run_and_damaged_middle(tmp_path):
    folder = _new(tmp_path)
    _write_points(folder, 3)
    points = folder.path / "points.csv"
    lines = points.read_text().splitlines(keepends=True)
    points.write_text(lines[0] + lines[1] + "1,2,3\n" + lines[3])
    with pytest.raises(RunError, match=r"points\.csv:3: expected 24 columns"):
        RunFolder.open_for_resume(folder.path)
    folder.finish("complete")
    with pytest.raises(RunError, match="already complete"):
        RunFolder.open_for_resume(folder.path)


WRITER_SCRIPT = textwrap.dedent("""\
    import sys
    from loopwright.store import RunFolder
    folder = RunFolder.create(sys.argv[1], "killed", "SN", {})
    print(folder.path, flush=True)
    i = 0
    while True:
        folder.append_point({"step": 0, "frequency_hz": 10.0 + i, "gain_re": 1.0,
                             "gain_im": -0.5, "flags": "unsettled"})
        print(i, flush=True)
        i += 1
    """)


def test_points_confirmed_before_sigkill_survive(tmp_path):
    # A real writer process killed with SIGKILL mid-run: every point it reported as
    # stored is on disk, the file is repaired to whole rows, and nothing is repeated.
    process = subprocess.Popen([sys.executable, "-c", WRITER_SCRIPT, str(tmp_path / "runs")],
                               stdout=subprocess.PIPE, text=True)
    assert process.stdout is not None
    path = Path(process.stdout.readline().strip())
    confirmed = -1
    while confirmed < 40:
        confirmed = int(process.stdout.readline())
    process.send_signal(signal.SIGKILL)
    process.wait(timeout=10)
    process.stdout.close()
    resumed = RunFolder.open_for_resume(path)
    indices = [p["index"] for p in resumed.done_points]
    assert indices == list(range(len(indices)))          # no gap, no repeat
    assert len(indices) >= confirmed + 1
    assert all(resumed.is_done(0, 10.0 + i) for i in range(confirmed + 1))
    assert (path / "points.csv").read_bytes().endswith(b"\n")


# ---------------------------------------------------------------------- atomic files


def test_manifest_update_is_atomic(tmp_path, monkeypatch):
    folder = _new(tmp_path)
    folder.update_manifest(station="bench 3", instruments={"generator": {"idn": "X,Y,1,2"}})
    manifest = json.loads((folder.path / "manifest.json").read_text())
    assert manifest["station"] == "bench 3" and manifest["status"] == "running"

    def failing_replace(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(writer_module.os, "replace", failing_replace)
    with pytest.raises(OSError):
        folder.update_manifest(status="failed", reason="disk full")
    monkeypatch.undo()
    # the old manifest is whole and unchanged, and no temporary file is left behind
    assert json.loads((folder.path / "manifest.json").read_text()) == manifest
    assert sorted(p.name for p in folder.path.iterdir()) == ["manifest.json"]
    with pytest.raises(RunError, match="unknown run status"):
        folder.update_manifest(status="paused")


def test_summary_and_finish(tmp_path):
    folder = _new(tmp_path)
    folder.write_summary({"verdict": "pass", "points": np.int64(3),
                          "analysis": {"phase_margin_deg": np.float64(51.5)}})
    with pytest.raises(RunError, match=r"summary\.json"):
        folder.write_summary({"value": float("nan")})
    folder.finish("aborted", "operator pressed Ctrl-C")
    run = load_run(folder.path)
    assert run.summary == {"verdict": "pass", "points": 3,
                           "analysis": {"phase_margin_deg": 51.5}}
    assert (run.status, run.manifest["reason"]) == ("aborted", "operator pressed Ctrl-C")
    with pytest.raises(RunError):
        folder.finish("running")


def test_capture_and_closed_loop_round_trip(tmp_path):
    folder = _new(tmp_path)
    t = np.arange(1000) / 1e5
    reference, response = np.sin(2e3 * np.pi * t), 0.5 * np.cos(2e3 * np.pi * t)
    path = folder.save_capture(12, reference, response, 1e5, 1e3, 0.2)
    assert path == folder.path / "captures" / "point_00012.npz"
    with np.load(path) as data:
        np.testing.assert_array_equal(data["reference_v"], reference)
        np.testing.assert_array_equal(data["response_v"], response)
        assert float(data["sample_rate_hz"]) == 1e5 and float(data["amplitude_vpp"]) == 0.2
    folder.write_closed_loop(t, response)
    with np.load(folder.path / "closed_loop.npz") as data:
        np.testing.assert_array_equal(data["time_s"], t)


def test_calibration_round_trip_and_interpolation(tmp_path):
    folder = _new(tmp_path)
    f = np.array([100.0, 1e3, 1e4])
    mismatch = np.array([1.0, 1.1 * np.exp(-0.1j), 1.21 * np.exp(-0.2j)])
    folder.write_calibration(f, mismatch)
    assert folder.manifest["calibration"] == "calibration.csv"
    cal_f, cal_m = read_calibration(folder.path)
    np.testing.assert_array_equal(cal_f, f)
    np.testing.assert_allclose(cal_m, mismatch, rtol=1e-15)
    assert load_run(folder.path).calibration is not None
    # exact at the nodes; half-way in log f, half the dB and half the phase
    np.testing.assert_allclose(mismatch_at(f, cal_f, cal_m), mismatch, rtol=1e-12)
    mid = mismatch_at([np.sqrt(1e3 * 1e4)], cal_f, cal_m)[0]
    assert 20 * np.log10(abs(mid)) == pytest.approx(20 * np.log10(1.1) * 1.5)
    assert np.angle(mid) == pytest.approx(-0.15)
    scalar = mismatch_at(1e3, cal_f, cal_m)               # a scalar in, a complex out
    assert isinstance(scalar, complex) and scalar == pytest.approx(mismatch[1])


# ---------------------------------------------------------------------- loading


def test_load_run_response_and_frd(tmp_path):
    import control

    folder = _new(tmp_path)
    frequencies = _write_points(folder, 9)
    folder.write_summary({"verdict": "none"})
    run = load_run(folder.path)
    response = run.response
    np.testing.assert_array_equal(response.frequency_hz, frequencies)
    np.testing.assert_allclose(response.h, _h(frequencies), rtol=1e-15)
    frd = run.to_frd()
    assert isinstance(frd, control.FrequencyResponseData)
    np.testing.assert_allclose(np.asarray(frd.omega), 2 * np.pi * np.asarray(frequencies))
    # python-control's margins assume negative feedback around L, and H = -L here
    np.testing.assert_allclose(np.squeeze(frd.frdata), -_h(frequencies), rtol=1e-15)
    assert run.steps == [1] and run.sign == 1
    with pytest.raises(RunError, match="no points for step 0"):
        run.response_for(0)


def test_to_frd_without_control(tmp_path, monkeypatch):
    folder = _new(tmp_path)
    _write_points(folder, 3)
    monkeypatch.setitem(sys.modules, "control", None)     # as if the extra were missing
    with pytest.raises(RunError, match=r"pip install 'loopwright\[control\]'"):
        load_run(folder.path).to_frd()


def test_not_a_run(tmp_path):
    with pytest.raises(InputError, match="not a folder"):
        load_run(tmp_path / "missing")
    (tmp_path / "empty").mkdir()
    with pytest.raises(InputError, match=r"no manifest\.json"):
        load_run(tmp_path / "empty")
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "manifest.json").write_text('{"format": "something-else"}')
    with pytest.raises(InputError, match="not a run manifest"):
        load_run(tmp_path / "other")
    (tmp_path / "broken").mkdir()
    (tmp_path / "broken" / "manifest.json").write_text('{\n"format": \n')
    with pytest.raises(InputError) as info:
        load_run(tmp_path / "broken")
    assert info.value.line == 3
    with pytest.raises(InputError):
        RunFolder.open_for_resume(tmp_path / "empty")


def test_load_run_without_points(tmp_path):
    folder = _new(tmp_path)
    run = load_run(folder.path)
    assert run.points.empty and list(run.points.columns) == list(POINT_COLUMNS)
    assert run.summary is None
    with pytest.raises(RunError, match="no points"):
        _ = run.response


# ---------------------------------------------------------------------- properties

@settings(max_examples=100, deadline=None)
@given(st.text(max_size=120))
def test_safe_part_properties(text):
    part = safe_part(text)
    assert 1 <= len(part) <= 64
    assert not part.startswith(".")
    assert set(part) <= set("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz"
                            "0123456789._-")
    assert part not in (".", "..")


@settings(max_examples=30, deadline=None)
@given(st.lists(st.floats(allow_nan=False, allow_infinity=False, width=64), min_size=1,
                max_size=5))
def test_float_columns_round_trip_exactly(tmp_path_factory, values):
    root = tmp_path_factory.mktemp("floats")
    folder = RunFolder.create(root, "p", "s", {}, now=MOMENT)
    for i, value in enumerate(values):
        folder.append_point({"step": 0, "frequency_hz": 1.0 + i, "gain_re": value,
                             "gain_im": -value})
    folder.close()
    resumed = RunFolder.open_for_resume(folder.path)
    assert [p["gain_re"] for p in resumed.done_points] == values
    assert load_run(folder.path).points["gain_im"].tolist() == [-v for v in values]


@pytest.mark.parametrize(("row", "message"), [
    ("1000,0,0,abc,0", "not a number in the calibration"),
    ("1000,0,0,0,0", "finite, non-zero mismatch"),
    ("0,0,0,1,0", "positive frequencies"),
    ("1000,0,0,nan,0", "finite, non-zero mismatch"),
    (None, "positive frequencies"),
], ids=["text", "zero-mismatch", "zero-hz", "nan", "no-rows"])
def test_unusable_calibration_is_our_input_error(tmp_path, row, message):
    """A mismatch of 0 would divide every later point by zero; text is no number."""
    path = tmp_path / "calibration.csv"
    header = "frequency_hz,mismatch_db,mismatch_deg,mismatch_re,mismatch_im\n"
    path.write_text(header + (row + "\n" if row else ""))
    with pytest.raises(InputError, match=message):
        read_calibration(path)


def test_points_with_a_non_numeric_cell_name_file_line_and_column(tmp_path):
    """A hand-edited points.csv: our InputError with file:line and the column."""
    from loopwright.errors import InputError
    from loopwright.store.load import read_points
    from loopwright.store.writer import POINT_COLUMNS

    path = tmp_path / "points.csv"
    row = ["0", "2026-01-01T00:00:00Z", "x"] + ["1"] * (len(POINT_COLUMNS) - 4) + [""]
    path.write_text(",".join(POINT_COLUMNS) + "\n" + ",".join(row) + "\n")
    with pytest.raises(InputError) as info:
        read_points(path)
    assert str(info.value).startswith(f"{path}:2: step:")
