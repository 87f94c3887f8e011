"""Property-based fuzzing of the data inputs of ``loopwright analyze`` and ``ratio``.

Responses start from the shipped examples (examples/*_response*.csv), captures from
examples/capture_regulator_12k5.csv/.npz (cut to a few cycles so a case stays fast).
Mutations: cells replaced by NaN, inf, 1e300, negatives, zero, words, unicode; one
point, header only, rows shuffled (non-monotonic frequencies), repeated, reversed;
columns renamed, dropped, doubled; mixed delimiters, BOM, CRLF or CR line ends, binary
garbage, truncation; for .npz wrong dtypes and shapes, missing or extra arrays, bad
sample rates, corrupted archives; odd ``--frequency`` values. Fully random bytes too.

The property: through the command line (``loopwright.cli.main`` in process) every
case exits 0 (valid input, and then stdout is valid JSON) or 2 with exactly one line
on stderr and never a traceback; through the API every case ends in success or in our
own error, and an :class:`InputError` about the file names it.
"""

from __future__ import annotations

import contextlib
import io
import json
import math
from collections import Counter
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from fuzz_settings import fuzz_settings
from loopwright.analysis import FrequencyResponse, analyze_loop
from loopwright.cli import main
from loopwright.commands.ratio import load_capture
from loopwright.errors import InputError, LoopwrightError

ROOT = Path(__file__).resolve().parents[1]
RESPONSES = sorted((ROOT / "examples").glob("*_response*.csv"))
CAPTURE_CSV = ROOT / "examples" / "capture_regulator_12k5.csv"
CAPTURE_NPZ = ROOT / "examples" / "capture_regulator_12k5.npz"
CAPTURE_HZ = 12_500.0
#: Samples kept of the example capture: 5 cycles at 2 MS/s.
CAPTURE_ROWS = 800

FAST = fuzz_settings(60)
HEAVY = fuzz_settings(120)

CASES: Counter[str] = Counter()

ODD_CELLS = [
    "nan", "NaN", "inf", "-inf", "Infinity", "1e300", "-1e300", "1e-320", "5e-324", "-5",
    "0", "-0", "", " ", "abc", "1,5", "1;5", "１２", "\u202e12", "12\u200f", "😀", " 12 ",
    "0x10", "1_0", "1e", "e3", "--1", "+1", "1e309", "\x00", "\t", '"7"', "'7'", "True",
]


@pytest.fixture(scope="module")
def workdir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("fuzz_csv")


@pytest.fixture(scope="module", autouse=True)
def report_counts(request: pytest.FixtureRequest) -> Iterator[None]:
    yield
    reporter = request.config.pluginmanager.getplugin("terminalreporter")
    capture = request.config.pluginmanager.getplugin("capturemanager")
    if reporter is None or not CASES:
        return
    with capture.global_and_fixture_disabled() if capture else contextlib.nullcontext():
        reporter.write_line("")
        reporter.write_line(f"CSV/npz fuzz cases run: {sum(CASES.values())} ("
                            + ", ".join(f"{k} {v}" for k, v in sorted(CASES.items())) + ")")


def read_rows(path: Path, keep: int | None = None) -> tuple[list[str], list[list[str]]]:
    """Header comment lines dropped: (header cells, data rows as cells)."""
    lines = [line for line in path.read_text().splitlines() if not line.startswith("#")]
    rows = [line.split(",") for line in lines[1:]]
    return lines[0].split(","), rows[:keep] if keep else rows


# ----------------------------------------------------------------------------- mutations


@st.composite
def table_mutation(draw: Callable[..., Any], header: list[str], rows: list[list[str]],
                   numeric: Callable[[], st.SearchStrategy[str]]) -> bytes:
    """A CSV table (header + rows) with one to three mutations, as bytes."""
    header = list(header)
    rows = [list(r) for r in rows]
    sep_lines: dict[int, str] = {}
    ending = "\n"
    prefix = b""
    for _ in range(draw(st.integers(1, 3))):
        action = draw(st.sampled_from([
            "cell", "cell", "cell", "one_row", "header_only", "shuffle", "duplicate_row",
            "reverse", "swap_two", "drop_cell", "extra_cell", "rename_column", "drop_column",
            "double_column", "extra_column", "delimiter", "bom", "crlf", "cr", "blank_lines",
            "comment", "no_rows",
        ]))
        if action == "cell" and rows:
            r = draw(st.integers(0, len(rows) - 1))
            c = draw(st.integers(0, len(rows[r]) - 1)) if rows[r] else 0
            value = draw(st.sampled_from(ODD_CELLS) | numeric() | st.text(max_size=8))
            if rows[r]:
                rows[r][c] = value
        elif action == "one_row":
            rows = rows[:1]
        elif action in ("header_only", "no_rows"):
            rows = []
        elif action == "shuffle":
            rows = draw(st.permutations(rows))
        elif action == "duplicate_row" and rows:
            r = draw(st.integers(0, len(rows) - 1))
            rows.insert(r, list(rows[r]))
        elif action == "reverse":
            rows = rows[::-1]
        elif action == "swap_two" and len(rows) > 1:
            i, j = draw(st.integers(0, len(rows) - 1)), draw(st.integers(0, len(rows) - 1))
            rows[i], rows[j] = rows[j], rows[i]
        elif action == "drop_cell" and rows:
            r = draw(st.integers(0, len(rows) - 1))
            rows[r] = rows[r][:-1]
        elif action == "extra_cell" and rows:
            r = draw(st.integers(0, len(rows) - 1))
            rows[r] = [*rows[r], draw(st.sampled_from(ODD_CELLS))]
        elif action == "rename_column":
            c = draw(st.integers(0, len(header) - 1))
            header[c] = draw(st.sampled_from(
                ["", "Frequency_Hz", "freq", "gain_db", "gain_re", "time_s", " time_s",
                 "\ufefffrequency_hz", "😀", "phase_deg_std"]))
        elif action == "drop_column" and len(header) > 1:
            c = draw(st.integers(0, len(header) - 1))
            header.pop(c)
            rows = [r[:c] + r[c + 1:] for r in rows]
        elif action == "double_column":
            c = draw(st.integers(0, len(header) - 1))
            header.append(header[c])
            rows = [[*r, r[c] if c < len(r) else ""] for r in rows]
        elif action == "extra_column":
            header.append("note")
            rows = [[*r, draw(st.sampled_from(["x", "", "1"]))] for r in rows]
        elif action == "delimiter" and rows:
            r = draw(st.integers(-1, len(rows) - 1))
            sep_lines[r] = draw(st.sampled_from([";", "\t", " ", "|"]))
        elif action == "bom":
            prefix = b"\xef\xbb\xbf"
        elif action == "crlf":
            ending = "\r\n"
        elif action == "cr":
            ending = "\r"
        elif action == "blank_lines" and rows:
            rows.insert(draw(st.integers(0, len(rows))), [])
        elif action == "comment":
            rows.insert(draw(st.integers(0, len(rows))), ["# a note, with a comma"])
    lines = [sep_lines.get(-1, ",").join(header)]
    lines += [sep_lines.get(i, ",").join(r) for i, r in enumerate(rows)]
    return prefix + (ending.join(lines) + ending).encode("utf-8", "surrogatepass")


@st.composite
def byte_mutation(draw: Callable[..., Any], raw: bytes) -> bytes:
    """Truncation, inserted garbage or fully random bytes."""
    action = draw(st.sampled_from(["cut", "garbage", "random", "empty", "nul"]))
    if action == "cut":
        return raw[: draw(st.integers(0, len(raw)))]
    if action == "garbage":
        at = draw(st.integers(0, len(raw)))
        return raw[:at] + draw(st.binary(min_size=1, max_size=32)) + raw[at:]
    if action == "random":
        return draw(st.binary(max_size=400))
    if action == "empty":
        return b""
    return raw.replace(b",", b"\x00", 1)


def response_numbers() -> st.SearchStrategy[str]:
    return st.floats(allow_nan=True, allow_infinity=True).map(repr)


# ----------------------------------------------------------------------------- checks


def cli(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    capsys.readouterr()
    code = main(args)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _no_constant(name: str) -> float:
    raise AssertionError(f"{name} in the JSON output: figures must be finite or null")


def assert_clean_exit(code: int, out: str, err: str) -> None:
    """0 with JSON on stdout, or 2 with one line on stderr."""
    assert "Traceback" not in err
    if code == 0:
        json.loads(out, parse_constant=_no_constant)  # strict JSON: no NaN, no Infinity
        return
    assert code == 2, (code, err)
    assert err.startswith("loopwright: error: "), err
    assert err.count("\n") == 1, err


def api_response(path: Path) -> None:
    """The API path of ``analyze``: our error or a result."""
    try:
        response = FrequencyResponse.from_csv(path)
    except InputError as exc:
        assert exc.path == str(path), exc
        assert "\n" not in str(exc)
        return
    for sign in (1, -1):
        try:
            analyze_loop(response, sign=sign)
        except LoopwrightError as exc:
            assert "\n" not in str(exc)


def check_analyze(raw: bytes, workdir: Path, capsys: pytest.CaptureFixture[str], sign: int,
                  label: str) -> None:
    path = workdir / "response.csv"
    path.write_bytes(raw)
    api_response(path)
    code, out, err = cli(["analyze", str(path), "--json", "--sign", str(sign)], capsys)
    assert_clean_exit(code, out, err)
    if code == 2:
        assert str(path) in err
    CASES[label] += 1


FREQUENCIES = st.sampled_from([CAPTURE_HZ] * 6 + [
    0.0, -CAPTURE_HZ, math.nan, math.inf, 1e300, 1e-300, 1e6, 2e6, 1.0, 12_501.0, 5e-324])


def check_ratio(path: Path, capsys: pytest.CaptureFixture[str], frequency_hz: float,
                estimator: str, label: str) -> None:
    try:
        load_capture(path)
    except InputError as exc:
        assert exc.path == str(path), exc
        assert "\n" not in str(exc)
    args = ["ratio", str(path), "--frequency", repr(frequency_hz), "--estimator", estimator,
            "--json"]
    code, out, err = cli(args, capsys)
    assert_clean_exit(code, out, err)
    CASES[label] += 1


# ----------------------------------------------------------------------------- analyze


def test_shipped_responses_analyze(workdir, capsys):
    for path in RESPONSES:
        code, out, err = cli(["analyze", str(path), "--json"], capsys)
        assert code == 0, err
        assert json.loads(out)["points"] > 2


@FAST
@given(data=st.data())
def test_response_csv_mutations_end_in_our_error(data, workdir, capsys):
    example = data.draw(st.sampled_from(RESPONSES), label="example")
    header, rows = read_rows(example)
    step = data.draw(st.integers(1, 4), label="stride")
    raw = data.draw(table_mutation(header, rows[::step], response_numbers), label="csv")
    check_analyze(raw, workdir, capsys, data.draw(st.sampled_from([1, -1])), "analyze-table")


@FAST
@given(data=st.data())
def test_response_bytes_end_in_our_error(data, workdir, capsys):
    raw = data.draw(byte_mutation(RESPONSES[0].read_bytes()), label="bytes")
    check_analyze(raw, workdir, capsys, 1, "analyze-bytes")


@FAST
@given(frequency=st.lists(st.floats(1e-3, 1e12), min_size=0, max_size=30),
       gain=st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=60,
                     max_size=60),
       rect=st.booleans())
def test_random_responses_end_in_our_error(frequency, gain, rect, workdir, capsys):
    """Random numbers in the right columns: odd orders, extreme and zero gains."""
    header = "frequency_hz,gain_re,gain_im" if rect else "frequency_hz,gain_db,phase_deg"
    lines = [header] + [f"{f!r},{gain[2 * i]!r},{gain[2 * i + 1]!r}"
                        for i, f in enumerate(frequency)]
    check_analyze(("\n".join(lines) + "\n").encode(), workdir, capsys, 1, "analyze-random")


# ----------------------------------------------------------------------------- ratio


def capture_numbers() -> st.SearchStrategy[str]:
    return st.floats(-1e3, 1e3).map(repr) | st.sampled_from(["nan", "inf", "1e300"])


@FAST
@given(data=st.data())
def test_capture_csv_mutations_end_in_our_error(data, workdir, capsys):
    header, rows = read_rows(CAPTURE_CSV, keep=CAPTURE_ROWS)
    keep = data.draw(st.sampled_from([CAPTURE_ROWS, CAPTURE_ROWS // 2, 100, 3, 2, 1]))
    raw = data.draw(table_mutation(header, rows[:keep], capture_numbers), label="csv")
    if data.draw(st.booleans(), label="headerless"):
        raw = raw.split(b"\n", 1)[-1]
    path = workdir / "capture.csv"
    path.write_bytes(raw)
    check_ratio(path, capsys, data.draw(FREQUENCIES, label="frequency_hz"),
                data.draw(st.sampled_from(["sinefit", "dft", "xcorr"])), "ratio-csv")


def _example_arrays() -> dict[str, np.ndarray]:
    with np.load(CAPTURE_NPZ) as data:
        arrays = {k: np.asarray(data[k]) for k in data.files}
    for key in ("reference_v", "response_v"):
        arrays[key] = arrays[key][:CAPTURE_ROWS]
    return arrays


ODD_ARRAYS: list[Any] = [
    np.array([]), np.zeros((2, 3)), np.array(["a", "b"]), np.array([1 + 2j, 3j]),
    np.array([np.nan, 1.0]), np.array([np.inf] * 4), np.array(5.0), np.array(-1.0),
    np.array(np.nan), np.array([True, False]), np.arange(10, dtype=np.int8),
    np.zeros(CAPTURE_ROWS, dtype=np.float32), np.full(CAPTURE_ROWS, 1e300),
    np.zeros(CAPTURE_ROWS), np.array("2e6"), np.array([2e6, 2e6]),
    np.arange(CAPTURE_ROWS) / 2e6, np.arange(CAPTURE_ROWS)[::-1] / 2e6,
    np.r_[np.arange(CAPTURE_ROWS - 1), CAPTURE_ROWS + 5] / 2e6,
    np.zeros(0, dtype=[("a", "f8")]),
]


@FAST
@given(data=st.data())
def test_capture_npz_mutations_end_in_our_error(data, workdir, capsys):
    arrays = _example_arrays()
    for _ in range(data.draw(st.integers(1, 3), label="mutations")):
        key = data.draw(st.sampled_from(
            ["reference_v", "response_v", "sample_rate_hz", "time_s", "note", "extra"]))
        action = data.draw(st.sampled_from(["replace", "replace", "delete", "scale"]))
        if action == "delete":
            arrays.pop(key, None)
        elif action == "scale" and key in arrays and arrays[key].dtype.kind == "f":
            arrays[key] = arrays[key] * data.draw(st.sampled_from([0.0, -1.0, 1e300, 1e-300]))
        else:
            arrays[key] = data.draw(st.sampled_from(ODD_ARRAYS))
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    raw = buffer.getvalue()
    if data.draw(st.integers(0, 5)) == 0:
        raw = data.draw(byte_mutation(raw), label="bytes")
    path = workdir / "capture.npz"
    path.write_bytes(raw)
    check_ratio(path, capsys, data.draw(FREQUENCIES, label="frequency_hz"),
                data.draw(st.sampled_from(["sinefit", "dft", "xcorr"])), "ratio-npz")


@pytest.mark.slow
@HEAVY
@given(data=st.data())
def test_many_table_mutations_end_in_our_error(data, workdir, capsys):
    """More cases of both tables, more mutations stacked."""
    if data.draw(st.booleans(), label="response"):
        header, rows = read_rows(data.draw(st.sampled_from(RESPONSES)))
        raw = data.draw(table_mutation(header, rows[::3], response_numbers))
        raw = data.draw(table_mutation(*_split(raw), response_numbers))
        check_analyze(raw, workdir, capsys, 1, "analyze-heavy")
    else:
        header, rows = read_rows(CAPTURE_CSV, keep=CAPTURE_ROWS)
        raw = data.draw(table_mutation(header, rows, capture_numbers))
        raw = data.draw(table_mutation(*_split(raw), capture_numbers))
        path = workdir / "capture.csv"
        path.write_bytes(raw)
        check_ratio(path, capsys, data.draw(FREQUENCIES), "sinefit", "ratio-heavy")


def _split(raw: bytes) -> tuple[list[str], list[list[str]]]:
    lines = raw.decode("utf-8", "replace").lstrip("\ufeff").splitlines() or [""]
    return lines[0].split(","), [line.split(",") for line in lines[1:]]
