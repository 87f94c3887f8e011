"""Property-based fuzzing of the YAML inputs: procedure, bench, driver and DUT files.

Every case starts from a shipped, valid example (procedures/*.yaml, drivers/*.yaml,
mock_instruments/dut_files/*.yaml) and mutates it: a value replaced by a wrong type or
an absurd number (NaN, .inf, 1e300, negative, start above stop), a key removed or an
unknown one added, unicode with control characters, RTL marks and emoji, huge lists;
or the text itself: a line repeated (a duplicate key), cut short, a BOM, binary
garbage, an alias bomb (billion laughs), a ``!!python/object`` tag. Fully random text
and bytes run too.

The property: loading ends either in success or in our own error
(:class:`loopwright.errors.LoopwrightError`); an :class:`InputError` names the file
and, for every non-empty file, the line. The same file through the command line
(``loopwright.cli.main`` in process) exits 0 or 2 with exactly one line on stderr,
never a traceback.

Hypothesis runs derandomized (``derandomize=True``), so CI sees the same cases every
time; the number of cases each test ran is printed at the end of the module.
"""

from __future__ import annotations

import contextlib
import copy
import io
import math
import sys
from collections import Counter
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any
from unittest import mock

import pytest
import yaml
from hypothesis import given
from hypothesis import strategies as st

from fuzz_settings import fuzz_settings
from loopwright.cli import main
from loopwright.errors import InputError, LoopwrightError
from loopwright.instruments.driver import load_driver
from loopwright.procedure import load_bench, load_procedure
from mock_instruments.duts import load_dut

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES: dict[str, list[Path]] = {
    "procedure": sorted(p for p in (ROOT / "procedures").glob("*.yaml")
                        if not p.name.startswith("bench")),
    "bench": sorted((ROOT / "procedures").glob("bench*.yaml")),
    "driver": sorted((ROOT / "drivers").glob("*.yaml")),
    "dut": sorted((ROOT / "mock_instruments" / "dut_files").glob("*.yaml")),
}
LOADERS: dict[str, Callable[[Path], Any]] = {
    "procedure": load_procedure, "bench": load_bench, "driver": load_driver, "dut": load_dut,
}
KINDS = tuple(EXAMPLES)

#: Examples per test (CI runs them all; the slow-marked ones too).
FAST = fuzz_settings(40)
HEAVY = fuzz_settings(40)

#: Cases run per test, printed at the end of the module.
CASES: Counter[str] = Counter()

# ----------------------------------------------------------------------------- values

ODD_TEXT = [
    "", " ", "\t", "x;*RST", "a\nb", "\x00", "\x07bell", "\u202eevil\u202c", "\u200f",
    "😀🔥", "e\u0301", "\ufeff", "\ud7ff", "名前", "a" * 5000, "..", "/etc/passwd",
    "{frequency_hz}", "{0}", "%s", "${HOME}", "*IDN?", "SYST:ERR?", "true", "null", "1e3",
    "-2e4+1.5e4j", "nanj", "1e400+1j", "0x10", "1_000",
]
ODD_NUMBERS = [
    0, -1, -0.0, 1, 2, -1e300, 1e300, 1e-300, math.nan, math.inf, -math.inf,
    10**400, 2**63, -(2**63), 5e-324, 3.5, 1e12, 1e13,
]
#: A long list, above the schema's list limits (1000 steps, 200 limits, 1000 corners).
HUGE_LIST = [1.0] * 2_500

scalars = st.one_of(
    st.sampled_from(ODD_NUMBERS), st.sampled_from(ODD_TEXT), st.none(), st.booleans(),
    st.integers(), st.floats(), st.text(max_size=40),
)
nested = st.recursive(
    scalars,
    lambda children: st.one_of(st.lists(children, max_size=4),
                               st.dictionaries(st.text(max_size=8), children, max_size=3)),
    max_leaves=8,
)
# one_of picks a branch uniformly: the huge list (slow to parse) in 1 case of 16
values = st.one_of(*[nested] * 15, st.just(HUGE_LIST))


def _paths(data: Any, here: tuple = ()) -> Iterator[tuple]:
    yield here
    if isinstance(data, dict):
        for key, value in data.items():
            yield from _paths(value, (*here, key))
    elif isinstance(data, list):
        for index, value in enumerate(data[:50]):
            yield from _paths(value, (*here, index))


def mutate_data(draw: Callable[..., Any], data: Any) -> Any:
    """One mutation of parsed YAML: replace, delete, add a key/item, or swap two values."""
    data = copy.deepcopy(data)
    paths = list(_paths(data))
    where = draw(st.sampled_from(paths))
    action = draw(st.sampled_from(["replace", "replace", "delete", "add", "swap_start_stop"]))
    if not where:
        return draw(values)
    parent = data
    for part in where[:-1]:
        parent = parent[part]
    last = where[-1]
    if action == "replace":
        parent[last] = draw(values)
    elif action == "delete":
        del parent[last]
    elif action == "add":
        if isinstance(parent, dict):
            parent[draw(st.sampled_from(["extra", "name", "Start_Hz", "kind", "max_hz",
                                         "model", "role", "\u202ekey", "😀"]))] = draw(values)
        else:
            parent.insert(draw(st.integers(0, len(parent))), draw(values))
    elif isinstance(parent, dict) and "start_hz" in parent and "stop_hz" in parent:
        parent["start_hz"], parent["stop_hz"] = parent["stop_hz"], parent["start_hz"]
    else:
        parent[last] = draw(values)
    return data


def dump(data: Any) -> str:
    """YAML text of ``data`` (NaN and infinities as YAML writes them)."""
    return yaml.safe_dump(data, allow_unicode=True, sort_keys=False, width=200)


ALIAS_BOMB = (
    'a: &a ["lol","lol","lol","lol","lol","lol","lol","lol","lol"]\n'
    'b: &b [*a,*a,*a,*a,*a,*a,*a,*a,*a]\n'
    'c: &c [*b,*b,*b,*b,*b,*b,*b,*b,*b]\n'
    'd: &d [*c,*c,*c,*c,*c,*c,*c,*c,*c]\n'
    'e: &e [*d,*d,*d,*d,*d,*d,*d,*d,*d]\n'
    'f: &f [*e,*e,*e,*e,*e,*e,*e,*e,*e]\n'
    'g: &g [*f,*f,*f,*f,*f,*f,*f,*f,*f]\n'
    'h: &h [*g,*g,*g,*g,*g,*g,*g,*g,*g]\n'
)


@st.composite
def text_mutation(draw: Callable[..., Any], original: str) -> bytes:
    """One mutation of the file's text or bytes."""
    lines = original.splitlines(keepends=True)
    action = draw(st.sampled_from([
        "duplicate_line", "cut", "insert_text", "insert_bytes", "bom", "alias_bomb",
        "python_tag", "tabs", "crlf", "delete_line", "empty", "only_comments",
    ]))
    if action == "duplicate_line":
        index = draw(st.integers(0, len(lines) - 1))
        lines.insert(index, lines[index])
        return "".join(lines).encode()
    if action == "cut":
        return original.encode()[: draw(st.integers(0, len(original)))]
    if action == "insert_text":
        at = draw(st.integers(0, len(original)))
        piece = draw(st.text(min_size=1, max_size=20) | st.sampled_from(ODD_TEXT))
        return (original[:at] + piece + original[at:]).encode("utf-8", "surrogatepass")
    if action == "insert_bytes":
        raw = original.encode()
        at = draw(st.integers(0, len(raw)))
        return raw[:at] + draw(st.binary(min_size=1, max_size=16)) + raw[at:]
    if action == "bom":
        return b"\xef\xbb\xbf" + original.encode()
    if action == "alias_bomb":
        return (original + "\n" + ALIAS_BOMB).encode()
    if action == "python_tag":
        index = draw(st.integers(0, len(lines)))
        lines.insert(index, "boom: !!python/object/apply:os.system ['echo pwned']\n")
        return "".join(lines).encode()
    if action == "tabs":
        return original.replace("  ", "\t").encode()
    if action == "crlf":
        return original.replace("\n", "\r\n").encode()
    if action == "delete_line":
        del lines[draw(st.integers(0, len(lines) - 1))]
        return "".join(lines).encode()
    if action == "empty":
        return b""
    return b"# nothing but a comment\n\n   \n"


# ----------------------------------------------------------------------------- checks


@pytest.fixture(scope="module")
def workdir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("fuzz_yaml")


@pytest.fixture(scope="module", autouse=True)
def report_counts(request: pytest.FixtureRequest) -> Iterator[None]:
    yield
    report_line(request, f"YAML fuzz cases run: {sum(CASES.values())} ("
                + ", ".join(f"{k} {v}" for k, v in sorted(CASES.items())) + ")")


def report_line(request: pytest.FixtureRequest, text: str) -> None:
    """One line on the terminal, past pytest's output capture."""
    reporter = request.config.pluginmanager.getplugin("terminalreporter")
    capture = request.config.pluginmanager.getplugin("capturemanager")
    if reporter is None or not CASES:
        return
    with capture.global_and_fixture_disabled() if capture else contextlib.nullcontext():
        reporter.write_line("")
        reporter.write_line(text)


def load_outcome(kind: str, path: Path) -> LoopwrightError | None:
    """Load ``path`` as a ``kind`` file: None on success, our error otherwise.

    Anything else (a TypeError, a RecursionError, ...) propagates and fails the test.
    """
    try:
        LOADERS[kind](path)
    except LoopwrightError as exc:
        if isinstance(exc, InputError):
            # a file's error names the file, and the line whenever the file has text
            assert exc.path == str(path), exc
            assert exc.line is not None or path.stat().st_size == 0, exc
        assert "\n" not in str(exc), repr(str(exc))
        return exc
    return None


#: A procedure no bench can allow (caps are at most 1000 Vpp): used to refuse a valid
#: bench file before any instrument is opened.
OVER_CAP_PROCEDURE = (
    "name: over-cap\nmethod: broken_loop\nsteps:\n  - kind: sweep\n"
    "    frequencies_hz: [1000]\n    amplitude_vpp: 5000\n")
#: A real bench whose instrument would refuse the connection; without --yes and without
#: a terminal the runner refuses a valid procedure before opening it.
REAL_BENCH = (
    "generator:\n  resource: 'TCPIP::127.0.0.1::1::SOCKET'\n"
    "scope:\n  resource: 'TCPIP::127.0.0.1::1::SOCKET'\n"
    "timeout_s: 0.5\nmax_amplitude_vpp: 1.0\nmax_frequency_hz: 1.0e6\n")


def cli_args(kind: str, path: Path, workdir: Path) -> list[str] | None:
    """The command line that reads ``path`` as a ``kind`` file."""
    if kind == "driver":
        return ["drivers", "check", str(path)]
    if kind == "procedure":
        bench = workdir / "real_bench.yaml"
        bench.write_text(REAL_BENCH)
        return ["run", str(path), "--bench", str(bench), "--out", str(workdir / "runs"),
                "--quiet", "--no-report"]
    if kind == "bench":
        procedure = workdir / "over_cap.yaml"
        procedure.write_text(OVER_CAP_PROCEDURE)
        return ["run", str(procedure), "--bench", str(path), "--out", str(workdir / "runs"),
                "--quiet", "--no-report"]
    # a valid DUT file would start serving; the CLI is checked on refused files only
    return ["sim", "serve", "--dut", str(path)]


def check_cli(kind: str, path: Path, workdir: Path, loaded: LoopwrightError | None,
              capsys: pytest.CaptureFixture[str]) -> None:
    """The CLI on the same file: exit 0 or 2, one line on stderr on error."""
    if kind == "dut" and loaded is None:
        return
    args = cli_args(kind, path, workdir)
    capsys.readouterr()
    with mock.patch.object(sys, "stdin", io.StringIO("")):  # no terminal, no operator
        code = main(args)
    err = capsys.readouterr().err
    if kind == "driver" and loaded is None:
        assert code == 0 and err == "", err
        return
    # procedure: refused (bad file, over a cap, or no --yes); bench: bad or over the cap
    assert code == 2, (code, err)
    assert err.startswith("loopwright: error: "), err
    assert err.count("\n") == 1, err
    if loaded is not None:
        assert str(loaded) in err
    assert not (workdir / "runs").exists() or not any((workdir / "runs").iterdir())


def run_case(kind: str, raw: bytes, workdir: Path, capsys: pytest.CaptureFixture[str],
             label: str) -> None:
    path = workdir / f"case_{kind}.yaml"
    path.write_bytes(raw)
    loaded = load_outcome(kind, path)
    check_cli(kind, path, workdir, loaded, capsys)
    CASES[label] += 1


# ----------------------------------------------------------------------------- tests


@pytest.mark.parametrize("kind", KINDS)
def test_shipped_examples_load_and_pass_the_cli(kind, workdir, capsys):
    """The starting points are valid (else every mutation test would be vacuous)."""
    for path in EXAMPLES[kind]:
        assert load_outcome(kind, path) is None, path
        if kind == "driver":
            check_cli(kind, path, workdir, None, capsys)


@pytest.mark.parametrize("kind", KINDS)
@FAST
@given(data=st.data())
def test_data_mutations_end_in_our_error(kind, data, workdir, capsys):
    example = data.draw(st.sampled_from(EXAMPLES[kind]), label="example")
    parsed = yaml.safe_load(example.read_text())
    for _ in range(data.draw(st.integers(1, 3), label="mutations")):
        parsed = mutate_data(data.draw, parsed)
    run_case(kind, dump(parsed).encode("utf-8", "surrogatepass"), workdir, capsys,
             f"{kind}-data")


@pytest.mark.parametrize("kind", KINDS)
@FAST
@given(data=st.data())
def test_text_mutations_end_in_our_error(kind, data, workdir, capsys):
    example = data.draw(st.sampled_from(EXAMPLES[kind]), label="example")
    raw = data.draw(text_mutation(example.read_text()), label="mutated")
    run_case(kind, raw, workdir, capsys, f"{kind}-text")


@pytest.mark.parametrize("kind", KINDS)
@FAST
@given(raw=st.one_of(st.binary(max_size=300), st.text(max_size=300).map(str.encode),
                     st.text(alphabet=st.characters(), max_size=300).map(
                         lambda t: t.encode("utf-8", "surrogatepass"))))
def test_random_bytes_end_in_our_error(kind, raw, workdir, capsys):
    run_case(kind, raw, workdir, capsys, f"{kind}-random")


@pytest.mark.slow
@pytest.mark.parametrize("kind", KINDS)
@HEAVY
@given(data=st.data())
def test_many_mutations_end_in_our_error(kind, data, workdir, capsys):
    """Longer chains of mutations (up to 5), data and text mixed."""
    example = data.draw(st.sampled_from(EXAMPLES[kind]), label="example")
    parsed = yaml.safe_load(example.read_text())
    for _ in range(data.draw(st.integers(2, 5), label="mutations")):
        parsed = mutate_data(data.draw, parsed)
    raw = data.draw(text_mutation(dump(parsed)), label="mutated")
    run_case(kind, raw, workdir, capsys, f"{kind}-heavy")
