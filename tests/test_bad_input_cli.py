"""A table of named bad inputs, each through the command line in process.

The fuzz tests (tests/test_fuzz_*.py) look for crashes at random; this table pins the
cases a user is most likely to meet and what they are told: exit code 2, exactly one
line on stderr naming the file, and the line and field where there is one. Cases the
fuzzers found are kept here as regressions.
"""

from __future__ import annotations

import io
import zipfile
from pathlib import Path

import numpy as np
import pytest

from loopwright.cli import main

ROOT = Path(__file__).resolve().parents[1]

SIM_BENCH = (b"simulated:\n  dut: rational\n  seed: 1\n"
             b"max_amplitude_vpp: 1.0\nmax_frequency_hz: 1.0e6\n")
GOOD_STEP = (b"  - kind: sweep\n    frequencies_hz: [1000, 2000]\n    amplitude_vpp: 0.1\n"
             b"    settle_cycles: 1\n    cycles_per_record: 4\n    min_samples: 256\n")
HEAD = b"name: bad-input\nmethod: broken_loop\nsteps:\n"


def procedure(step_lines: bytes = GOOD_STEP, head: bytes = HEAD) -> bytes:
    return head + step_lines


ALIAS_BOMB = b"".join(
    f"{chr(97 + i)}: &{chr(97 + i)} [{','.join([f'*{chr(96 + i)}'] * 9) if i else '1,2'}]\n"
    .encode() for i in range(9))

#: (id, command before the file, file name, content, after the file,
#:  words the error must contain; "{path}" is replaced by the file's path)
PROCEDURE_CASES = [
    ("empty", b"", ["{path}:1:", "empty"]),
    ("only-comments", b"# nothing\n\n", ["{path}:1:", "empty"]),
    ("binary", b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", ["{path}", "not UTF-8"]),
    ("control-char", b"name: a\x07b\nmethod: broken_loop\n", ["{path}:1:", "U+0007"]),
    ("not-a-mapping", b"- 1\n- 2\n", ["{path}:1:", "mapping"]),
    ("alias-bomb", ALIAS_BOMB, ["{path}:", "alias bomb"]),
    ("merge-key", b"base: &b {x: 1}\nname: {<<: *b}\n", ["{path}:2:", "merge keys"]),
    ("python-tag", b"name: !!python/object/apply:os.getcwd []\n", ["{path}:1:", "tag"]),
    ("tab-indent", b"name: x\nsteps:\n\t- kind: sweep\n", ["{path}:3:", "not valid YAML"]),
    ("duplicate-key", procedure(head=HEAD.replace(b"method", b"name: again\nmethod")),
     ["{path}:2:", "duplicate key 'name'", "first on line 1"]),
    ("unknown-key", procedure(GOOD_STEP.replace(b"amplitude_vpp", b"amplitude_vp")),
     ["{path}:6:", "steps[0].amplitude_vp", "did you mean 'amplitude_vpp'"]),
    ("missing-method", procedure(head=b"name: x\nsteps:\n"), ["{path}", "method", "missing"]),
    ("wrong-type", procedure(GOOD_STEP.replace(b"[1000, 2000]", b"abc")),
     ["{path}:5:", "steps[0].frequencies_hz"]),
    ("negative-frequency", procedure(GOOD_STEP.replace(b"[1000, 2000]", b"[-1000, 2000]")),
     ["{path}:5:", "steps[0].frequencies_hz[0]", "greater than 0"]),
    ("nan-frequency", procedure(GOOD_STEP.replace(b"[1000, 2000]", b"[.nan, 2000]")),
     ["{path}:5:", "steps[0].frequencies_hz[0]", "finite"]),
    ("inf-amplitude", procedure(GOOD_STEP.replace(b"0.1", b".inf")),
     ["{path}:6:", "steps[0].amplitude_vpp", "finite"]),
    ("absurd-frequency", procedure(GOOD_STEP.replace(b"[1000, 2000]", b"[1000, 1.0e300]")),
     ["{path}:5:", "steps[0].frequencies_hz[1]"]),
    ("start-above-stop", procedure(
        b"  - kind: sweep\n    start_hz: 5000\n    stop_hz: 100\n    count: 5\n"
        b"    amplitude_vpp: 0.1\n"), ["{path}:6:", "steps[0].stop_hz", "above start_hz"]),
    ("duplicate-frequency", procedure(GOOD_STEP.replace(b"[1000, 2000]", b"[1000, 1000]")),
     ["{path}:5:", "duplicate frequency"]),
    ("bool-as-number", procedure(GOOD_STEP.replace(b"0.1", b"yes")),
     ["{path}:6:", "amplitude_vpp", "true/false"]),
    ("rtl-mark-in-name", procedure(head=HEAD.replace(b"bad-input", "a\u202eb".encode())),
     ["{path}:1:", "name", "U+202E"]),
    ("too-many-steps", procedure(b"".join([b"  - kind: prompt\n    text: hi\n"] * 1001)),
     ["{path}:3:", "steps", "at most 1000"]),
    ("huge-plan", procedure(
        b"  - kind: sweep\n    start_hz: 1\n    stop_hz: 1.0e11\n    points_per_decade: 10000\n"
        b"    amplitude_vpp: 0.1\n"), ["{path}:", "at most 100000"]),
    ("unknown-step-kind", procedure(GOOD_STEP.replace(b"kind: sweep", b"kind: swep")),
     ["{path}:4:", "steps[0].kind", "did you mean 'sweep'"]),
    ("over-the-cap", procedure(GOOD_STEP.replace(b"0.1", b"5.0")),
     ["{path}:6:", "max_amplitude_vpp", "nothing was sent"]),
]

BENCH_CASES = [
    ("missing-caps", b"simulated:\n  dut: rational\n", ["{path}:1:", "max_amplitude_vpp"]),
    ("negative-cap", SIM_BENCH.replace(b"1.0e6", b"-5"),
     ["{path}:5:", "max_frequency_hz", "greater than 0"]),
    ("both-kinds", SIM_BENCH + b"generator:\n  resource: 'TCPIP::1.2.3.4::INSTR'\n",
     ["{path}", "simulated bench has no 'generator'"]),
    ("no-scope", b"generator:\n  resource: x\nmax_amplitude_vpp: 1\nmax_frequency_hz: 1e6\n",
     ["{path}", "needs a 'scope'"]),
    ("resource-with-newline", b"generator:\n  resource: \"TCPIP::1::INSTR\\n*RST\"\n"
     b"scope:\n  resource: y\nmax_amplitude_vpp: 1\nmax_frequency_hz: 1e6\n",
     ["{path}:2:", "generator.resource", "U+000A"]),
    ("same-channels", SIM_BENCH + b"channels:\n  reference: 2\n  response: 2\n",
     ["{path}:8:", "channels.response", "different"]),
    ("unknown-transport", SIM_BENCH.replace(b"seed: 1", b"transport: udp"),
     ["{path}:3:", "simulated.transport", "tcp"]),
    # refused when the bench is read, before a run folder is made
    ("unknown-dut", SIM_BENCH.replace(b"rational", b"rationl"),
     ["{path}:2:", "simulated.dut", "did you mean 'rational'"]),
    ("missing-dut-file", SIM_BENCH.replace(b"rational", b"no_such_board.yaml"),
     ["{path}:2:", "simulated.dut", "no DUT file"]),
]

DRIVER_CASES = [
    ("role-is-a-list", b"name: x\nrole: [generator]\n", ["{path}:2:", "role", "one of"]),
    ("format-spec-in-template", (ROOT / "drivers" / "generator-source-tree.yaml").read_bytes()
     .replace(b"'SOUR1:FREQ {frequency_hz}'", b"'SOUR1:FREQ {frequency_hz:.3f}'"),
     ["{path}:", "commands.set_frequency"]),
    ("missing-limits", (ROOT / "drivers" / "generator-source-tree.yaml").read_bytes()
     .replace(b"  frequency_hz: {min: 0.001, max: 20.0e6, format: .10g}\n", b""),
     ["{path}:", "frequency_hz"]),
]

DUT_CASES = [
    ("model-is-a-list", b"model: []\n", ["{path}:1:", "model", "unknown DUT model"]),
    ("model-is-a-mapping", b"model: {}\n", ["{path}:1:", "model", "unknown DUT model"]),
    ("nan-capacitance", b"model: wien\ncapacitance_f: .nan\n",
     ["{path}:2:", "capacitance_f", "finite"]),
    ("nan-root", b"model: rational\npoles_hz: [-1000, nanj]\n",
     ["{path}:2:", "poles_hz", "finite"]),
    ("absurd-inductance", b"model: lc_oscillator\ninductance_h: 1.0e-300\n",
     ["{path}", "real circuit"]),
    ("absurd-gain", b"model: wien\ngain: 1.0e+300\n", ["{path}", "closed-loop pole above"]),
    ("unknown-parameter", b"model: wien\ncapacitance: 1e-9\n",
     ["{path}:2:", "capacitance", "did you mean 'capacitance_f'"]),
]

RESPONSE = (b"frequency_hz,gain_db,phase_deg\n1000,20,-90\n2000,10,-120\n4000,0,-150\n"
            b"8000,-10,-170\n")
RESPONSE_CASES = [
    ("empty", b"", ["{path}", "empty"]),
    ("header-only", b"frequency_hz,gain_db,phase_deg\n", ["{path}", "at least 2 points"]),
    ("one-point", b"frequency_hz,gain_db,phase_deg\n1000,3,-100\n",
     ["{path}", "at least 2 points, got 1"]),
    ("non-monotonic", RESPONSE.replace(b"4000", b"1500"), ["{path}:4:", "frequency_hz",
                                                           "sorted"]),
    ("duplicate-frequency", RESPONSE.replace(b"4000", b"2000"),
     ["{path}:4:", "duplicate frequency"]),
    ("negative-frequency", RESPONSE.replace(b"1000,", b"-1000,"),
     ["{path}:2:", "not positive"]),
    ("nan-cell", RESPONSE.replace(b"-120", b"nan"), ["{path}:3:", "phase_deg", "finite"]),
    ("overflowing-gain", RESPONSE.replace(b"20,", b"1e300,"),
     ["{path}:2:", "gain_db,phase_deg", "finite"]),
    ("zero-gain", b"frequency_hz,gain_re,gain_im\n1000,0,0\n2000,1,1\n",
     ["{path}:2:", "gain is zero"]),
    ("semicolons", RESPONSE.replace(b",", b";"), ["{path}:1:", "frequency_hz"]),
    ("mixed-delimiters", RESPONSE.replace(b"2000,10,", b"2000;10;"),
     ["{path}:3:", "cells but the header has 3"]),
    ("words", RESPONSE.replace(b"-150", b"minus150"), ["{path}:4:", "phase_deg",
                                                        "not a number"]),
    ("missing-column", b"frequency_hz,gain_db\n1,2\n3,4\n", ["{path}:1:", "phase_deg"]),
    ("binary", b"\xff\xfe\x00\x01garbage", ["{path}", "UTF-8"]),
]

CAPTURE_ROWS = [f"{n / 1e5!r},{float(np.cos(2 * np.pi * 1e3 * n / 1e5))!r},"
                f"{float(0.5 * np.sin(2 * np.pi * 1e3 * n / 1e5))!r}" for n in range(1000)]
CAPTURE = ("time_s,reference_v,response_v\n" + "\n".join(CAPTURE_ROWS) + "\n").encode()


def npz_bytes(**arrays: object) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


REF = np.cos(2 * np.pi * 1e3 * np.arange(1000) / 1e5)
CAPTURE_CASES = [
    ("empty", "c.csv", b"", [], ["{path}", "empty"]),
    ("header-only", "c.csv", b"time_s,reference_v,response_v\n", [],
     ["{path}", "no samples"]),
    ("one-sample", "c.csv", b"time_s,reference_v,response_v\n0,1,1\n", [],
     ["{path}", "at least two samples"]),
    ("time-backwards", "c.csv", CAPTURE.replace(b"0.0001,", b"-0.0001,", 1), [],
     ["{path}:12:", "time_s", "does not increase (9e-05 then -0.0001)"]),
    ("dropped-sample", "c.csv", CAPTURE.replace(CAPTURE_ROWS[500].encode() + b"\n", b""), [],
     ["{path}:", "time_s", "uneven"]),
    ("bom-and-crlf", "c.csv", b"\xef\xbb\xbf" + CAPTURE.replace(b"\n", b"\r\n"), [], None),
    ("inf-sample", "c.csv", CAPTURE.replace(CAPTURE_ROWS[3].encode(), b"3e-05,inf,0"), [],
     ["{path}:5:", "reference_v", "finite"]),
    ("wrong-header", "c.csv", CAPTURE.replace(b"time_s", b"t", 1), [],
     ["{path}:1:", "expected 'time_s,reference_v,response_v'"]),
    ("above-nyquist", "c.csv", CAPTURE, ["--frequency", "6e4"], ["{path}", "Nyquist"]),
    ("nan-frequency", "c.csv", CAPTURE, ["--frequency", "nan"], ["{path}"]),
    ("negative-frequency", "c.csv", CAPTURE, ["--frequency", "-1000"], ["{path}"]),
    ("npz-missing-array", "c.npz", npz_bytes(reference_v=REF, sample_rate_hz=1e5), [],
     ["{path}", "response_v", "missing array"]),
    ("npz-pickled-objects", "c.npz", npz_bytes(reference_v=np.array([REF, "x"], dtype=object),
                                               response_v=REF, sample_rate_hz=1e5), [],
     ["{path}", "not a readable .npz"]),
    ("npz-two-dimensional", "c.npz", npz_bytes(reference_v=np.ones((2, 500)), response_v=REF,
                                               sample_rate_hz=1e5), [],
     ["{path}", "reference_v", "1-D"]),
    ("npz-negative-rate", "c.npz", npz_bytes(reference_v=REF, response_v=REF,
                                             sample_rate_hz=-1.0), [],
     ["{path}", "sample_rate_hz", "positive"]),
    ("npz-text-rate", "c.npz", npz_bytes(reference_v=REF, response_v=REF,
                                         sample_rate_hz="fast"), [],
     ["{path}", "sample_rate_hz"]),
    ("npz-truncated", "c.npz", npz_bytes(reference_v=REF, response_v=REF,
                                         sample_rate_hz=1e5)[:300], [],
     ["{path}", "not a readable .npz"]),
    ("npz-not-a-zip", "c.npz", b"PK\x03\x04" + b"\x00" * 40, [], ["{path}", ".npz"]),
]

CASE_COUNT = (len(PROCEDURE_CASES) + len(BENCH_CASES) + len(DRIVER_CASES) + len(DUT_CASES)
              + len(RESPONSE_CASES) + len(CAPTURE_CASES))


def run_cli(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str]:
    capsys.readouterr()
    code = main(args)
    return code, capsys.readouterr().err


def assert_refused(code: int, err: str, path: Path, words: list[str]) -> None:
    assert code == 2, (code, err)
    assert err.startswith("loopwright: error: ") and err.count("\n") == 1, err
    assert "Traceback" not in err
    for word in words:
        assert word.replace("{path}", str(path)) in err, (word, err)


@pytest.mark.parametrize(("content", "words"), [c[1:] for c in PROCEDURE_CASES],
                         ids=[c[0] for c in PROCEDURE_CASES])
def test_bad_procedure(tmp_path, capsys, content, words):
    path = tmp_path / "procedure.yaml"
    path.write_bytes(content)
    bench = tmp_path / "bench.yaml"
    bench.write_bytes(SIM_BENCH)
    code, err = run_cli(["run", str(path), "--bench", str(bench), "--out",
                         str(tmp_path / "runs"), "--quiet"], capsys)
    assert_refused(code, err, path, words)
    assert not (tmp_path / "runs").exists()


@pytest.mark.parametrize(("content", "words"), [c[1:] for c in BENCH_CASES],
                         ids=[c[0] for c in BENCH_CASES])
def test_bad_bench(tmp_path, capsys, content, words):
    path = tmp_path / "bench.yaml"
    path.write_bytes(content)
    good = tmp_path / "procedure.yaml"
    good.write_bytes(procedure())
    code, err = run_cli(["run", str(good), "--bench", str(path), "--out",
                         str(tmp_path / "runs"), "--quiet"], capsys)
    assert_refused(code, err, path, words)
    assert not (tmp_path / "runs").exists()


@pytest.mark.parametrize(("content", "words"), [c[1:] for c in DRIVER_CASES],
                         ids=[c[0] for c in DRIVER_CASES])
def test_bad_driver(tmp_path, capsys, content, words):
    path = tmp_path / "driver.yaml"
    path.write_bytes(content)
    code, err = run_cli(["drivers", "check", str(path)], capsys)
    assert_refused(code, err, path, words)


@pytest.mark.parametrize(("content", "words"), [c[1:] for c in DUT_CASES],
                         ids=[c[0] for c in DUT_CASES])
def test_bad_dut(tmp_path, capsys, content, words):
    path = tmp_path / "dut.yaml"
    path.write_bytes(content)
    code, err = run_cli(["sim", "serve", "--dut", str(path)], capsys)
    assert_refused(code, err, path, words)


@pytest.mark.parametrize(("content", "words"), [c[1:] for c in RESPONSE_CASES],
                         ids=[c[0] for c in RESPONSE_CASES])
def test_bad_response(tmp_path, capsys, content, words):
    path = tmp_path / "response.csv"
    path.write_bytes(content)
    code, err = run_cli(["analyze", str(path)], capsys)
    assert_refused(code, err, path, words)


@pytest.mark.parametrize(("name", "content", "extra", "words"), [c[1:] for c in CAPTURE_CASES],
                         ids=[c[0] for c in CAPTURE_CASES])
def test_bad_capture(tmp_path, capsys, name, content, extra, words):
    path = tmp_path / name
    path.write_bytes(content)
    args = ["ratio", str(path), "--frequency", "1000", *extra]
    code, err = run_cli(args, capsys)
    if words is None:  # a valid file in an odd dress reads fine
        assert code == 0, err
        return
    assert_refused(code, err, path, words)


def test_bom_and_crlf_response_reads(tmp_path, capsys):
    path = tmp_path / "r.csv"
    path.write_bytes(b"\xef\xbb\xbf" + RESPONSE.replace(b"\n", b"\r\n"))
    code, err = run_cli(["analyze", str(path), "--json"], capsys)
    assert code == 0, err


def test_narrow_peak_found_by_the_fuzzer_reads(tmp_path, capsys):
    """Regression: half-power points meeting in one float divided by a zero width."""
    rows = (ROOT / "examples" / "tank_oscillator_loop_response.csv").read_text().splitlines()
    kept = [rows[0], *rows[1::2]]
    kept[15] = kept[15].rsplit(",", 1)[0] + ",3.0"  # one wild point: a sharp, narrow peak
    path = tmp_path / "r.csv"
    path.write_text("\n".join(kept) + "\n")
    code, err = run_cli(["analyze", str(path), "--json", "--sign", "-1"], capsys)
    assert code == 0, err


def test_npz_with_a_zip_bomb_name_is_not_extracted(tmp_path, capsys):
    """An .npz is a zip: a member outside the archive's names is never written to disk."""
    path = tmp_path / "c.npz"
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("../../escaped.npy", b"\x93NUMPY garbage")
    code, err = run_cli(["ratio", str(path), "--frequency", "1000"], capsys)
    assert_refused(code, err, path, ["{path}"])
    assert not (tmp_path.parent.parent / "escaped.npy").exists()


def test_case_count():
    """The table holds what the README says (see benchmarks/RESULTS-badinput.md)."""
    assert CASE_COUNT >= 70
