"""``loopwright ratio``: captures in, one gain/phase point out; bad files exit 2."""

from __future__ import annotations

import json
import math
import subprocess
import sys

import numpy as np
import pytest

from loopwright.cli import main

FS = 200_000.0
N = 8000
F = 2_500.0


def _rc(f, r_ohm=10e3, c_farad=10e-9):
    """First-order RC low-pass, H = 1 / (1 + j w R C) (textbook formula)."""
    return 1.0 / (1.0 + 1j * 2 * math.pi * f * r_ohm * c_farad)


def _columns():
    t = np.arange(N) / FS
    h = _rc(F)
    ref = 0.4 * np.cos(2 * np.pi * F * t + 0.1) + 0.02
    resp = 0.4 * abs(h) * np.cos(2 * np.pi * F * t + 0.1 + np.angle(h)) - 0.01
    return t, ref, resp


def _rows(t, ref, resp):
    cols = zip(t.tolist(), ref.tolist(), resp.tolist(), strict=True)
    return [f"{a!r},{b!r},{c!r}" for a, b, c in cols]


def _write_csv(path, header=True, rows=None):
    t, ref, resp = _columns()
    lines = ["time_s,reference_v,response_v"] if header else []
    if rows is None:
        rows = _rows(t, ref, resp)
    path.write_text("\n".join(lines + rows) + "\n")
    return path


@pytest.fixture
def good_csv(tmp_path):
    return _write_csv(tmp_path / "capture.csv")


def _run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def _check_rc(d, tol_db=1e-6, tol_deg=1e-5):
    h = _rc(F)
    assert d["gain_db"] == pytest.approx(20 * math.log10(abs(h)), abs=tol_db)
    assert d["phase_deg"] == pytest.approx(math.degrees(np.angle(h)), abs=tol_deg)


def test_json_from_csv_with_header(good_csv, capsys):
    code, out, _ = _run(["ratio", str(good_csv), "--frequency", str(F), "--json"], capsys)
    assert code == 0
    d = json.loads(out)
    for key in ("frequency_hz", "gain_db", "phase_deg", "gain_db_std", "phase_deg_std"):
        assert key in d
    for key in ("amplitude_v", "offset_v", "snr_db", "thd_pct"):
        assert key in d["reference"] and key in d["response"]
    _check_rc(d)
    assert d["reference"]["offset_v"] == pytest.approx(0.02, abs=1e-9)
    assert d["frequency_hz"] == pytest.approx(F, rel=1e-9)


def test_headerless_csv_and_npz_give_the_same_point(tmp_path, capsys):
    t, ref, resp = _columns()
    plain = _write_csv(tmp_path / "plain.csv", header=False)
    with_time = tmp_path / "with_time.npz"
    np.savez(with_time, time_s=t, reference_v=ref, response_v=resp)
    with_rate = tmp_path / "with_rate.npz"
    np.savez(with_rate, reference_v=ref, response_v=resp, sample_rate_hz=FS)
    for path in (plain, with_time, with_rate):
        code, out, err = _run(["ratio", str(path), "--frequency", str(F), "--json"], capsys)
        assert code == 0, err
        _check_rc(json.loads(out))


@pytest.mark.parametrize(("estimator", "window"), [("dft", "flattop"), ("xcorr", None)])
def test_other_estimators(good_csv, capsys, estimator, window):
    argv = ["ratio", str(good_csv), "--frequency", str(F), "--estimator", estimator, "--json"]
    if window:
        argv += ["--window", window]
    code, out, _ = _run(argv, capsys)
    assert code == 0
    d = json.loads(out)
    assert d["method"] == estimator
    # 100 whole cycles: no leakage for dft; xcorr's segments hold 8.33 cycles each and
    # keep a small leakage bias (measured 5e-5 dB)
    _check_rc(d, 1e-6, 1e-5) if estimator == "dft" else _check_rc(d, 1e-3, 1e-3)


def test_table_output(good_csv, capsys):
    code, out, _ = _run(["ratio", str(good_csv), "--frequency", str(F)], capsys)
    assert code == 0
    for word in ("gain", "phase", "frequency", "reference", "response", "SNR", "THD", "dB"):
        assert word in out
    h = _rc(F)
    assert f"{20 * math.log10(abs(h)):.4f} dB" in out


def test_table_output_shows_a_bracketed_path_as_text(good_csv, tmp_path, capsys):
    # a folder "x[" and a file "y].csv" make the path hold "[/y]": text, not rich markup
    (tmp_path / "x[").mkdir()
    odd = tmp_path / "x[" / "y].csv"
    odd.write_bytes(good_csv.read_bytes())
    code, out, _ = _run(["ratio", str(odd), "--frequency", str(F)], capsys)
    assert code == 0 and "[/y].csv" in out.replace("\n", "")


def test_window_with_sinefit_is_refused(good_csv, capsys):
    code, _, err = _run(["ratio", str(good_csv), "--frequency", str(F), "--window", "hann"],
                        capsys)
    assert code == 2 and "--window" in err


def _bad_csv_cases():
    t, ref, resp = _columns()
    rows = _rows(t, ref, resp)

    def edit(i, text):
        out = list(rows)
        out[i] = text
        return out

    return {
        # name: (header, rows, expected text in the message)
        "wrong header": ("time,ch1,ch2", rows, ":1: header"),
        "four columns": (None, edit(4, rows[4] + ",1.0"), ":6: expected 3 columns"),
        "non-numeric cell": (None, edit(9, f"{t[9].item()!r},abc,0.1"), ":11: reference_v: 'abc'"),
        "nan cell": (None, edit(20, f"{t[20].item()!r},0.1,nan"), ":22: response_v: 'nan'"),
        "time goes back": (
            None, edit(30, f"{t[28].item()!r},0.1,0.1"), ":32: time_s: time does not"
        ),
        "dropped sample": (None, rows[:50] + rows[51:], ":52: time_s: uneven time step"),
        "header only": (None, [], "no samples"),
    }


@pytest.mark.parametrize("case", list(_bad_csv_cases()))
def test_bad_csv_exits_2_with_file_and_line(tmp_path, capsys, case):
    header, rows, expected = _bad_csv_cases()[case]
    path = tmp_path / "bad.csv"
    lines = [header or "time_s,reference_v,response_v", *rows]
    path.write_text("\n".join(lines) + "\n")
    code, _, err = _run(["ratio", str(path), "--frequency", str(F)], capsys)
    assert code == 2
    assert str(path) in err
    assert expected in err
    assert "Traceback" not in err
    assert len(err.strip().splitlines()) == 1


def test_missing_and_empty_files(tmp_path, capsys):
    missing = tmp_path / "missing.csv"
    code, _, err = _run(["ratio", str(missing), "--frequency", "1000"], capsys)
    assert code == 2 and str(missing) in err and "no such" in err
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    code, _, err = _run(["ratio", str(empty), "--frequency", "1000"], capsys)
    assert code == 2 and str(empty) in err and "empty" in err


def test_bad_npz_files(tmp_path, capsys):
    t, ref, resp = _columns()
    cases = {}
    cases["no_response.npz"] = dict(time_s=t, reference_v=ref)
    cases["nan.npz"] = dict(time_s=t, reference_v=np.where(t == t[5], np.nan, ref),
                            response_v=resp)
    cases["no_rate.npz"] = dict(reference_v=ref, response_v=resp)
    cases["back_in_time.npz"] = dict(time_s=t[::-1], reference_v=ref, response_v=resp)
    expected = {"no_response.npz": "response_v", "nan.npz": "reference_v[5]",
                "no_rate.npz": "sample_rate_hz", "back_in_time.npz": "time_s[1]"}
    for name, arrays in cases.items():
        path = tmp_path / name
        np.savez(path, **arrays)
        code, _, err = _run(["ratio", str(path), "--frequency", str(F)], capsys)
        assert code == 2, name
        assert str(path) in err and expected[name] in err, err
    junk = tmp_path / "junk.npz"
    junk.write_bytes(b"not a zip file at all")
    code, _, err = _run(["ratio", str(junk), "--frequency", str(F)], capsys)
    assert code == 2 and str(junk) in err and "npz" in err


def test_estimation_error_names_the_file(good_csv, capsys):
    # 8000 samples at 200 kS/s hold 1 cycle of 25 Hz: too short
    code, _, err = _run(["ratio", str(good_csv), "--frequency", "25"], capsys)
    assert code == 2 and str(good_csv) in err and "cycles" in err


def test_subprocess_json_and_bad_file(good_csv, tmp_path):
    result = subprocess.run(
        [sys.executable, "-m", "loopwright", "ratio", str(good_csv), "--frequency", str(F),
         "--json"],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert result.returncode == 0, result.stderr
    _check_rc(json.loads(result.stdout))
    bad = tmp_path / "bad.csv"
    bad.write_text("time_s,reference_v,response_v\n0,1,2\n1e-6,x,2\n")
    result = subprocess.run(
        [sys.executable, "-m", "loopwright", "ratio", str(bad), "--frequency", "1000"],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert result.returncode == 2
    assert f"{bad}:3: reference_v" in result.stderr
    assert "Traceback" not in result.stderr


def test_comment_lines_are_skipped(tmp_path, capsys):
    t, ref, resp = _columns()
    path = tmp_path / "commented.csv"
    path.write_text(
        "# saved by a scope\n# second note\ntime_s,reference_v,response_v\n"
        + "\n".join(_rows(t, ref, resp)) + "\n"
    )
    code, out, err = _run(["ratio", str(path), "--frequency", str(F), "--json"], capsys)
    assert code == 0, err
    _check_rc(json.loads(out))


@pytest.mark.parametrize("name", ["capture_regulator_12k5.csv", "capture_regulator_12k5.npz"])
def test_shipped_example_capture(capsys, name):
    # the invented example of examples/make_capture.py: H = 1.12 at -128 deg, with a
    # 150 ppm clock offset the sine fit absorbs (values synthesised there, not measured)
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "examples" / name
    code, out, err = _run(["ratio", str(path), "--frequency", "12500", "--json"], capsys)
    assert code == 0, err
    d = json.loads(out)
    assert d["gain_db"] == pytest.approx(20 * math.log10(1.12), abs=5 * d["gain_db_std"])
    assert d["phase_deg"] == pytest.approx(-128.0, abs=5 * d["phase_deg_std"])
    assert d["frequency_hz"] == pytest.approx(12500 * (1 + 150e-6), rel=1e-6)
