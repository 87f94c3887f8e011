"""Safety and security: what files and arguments can and cannot make the tool do.

- No string from a procedure, a bench file or the command line reaches an instrument
  as a command: ``;``, newlines, ``*RST``, ``SYST:ERR?`` ... in every string field, run
  on the simulated bench over pyvisa-py; the run's traffic.log (every command sent)
  and the instruments' own view (every line received) never show them.
- The simulated bench listens on 127.0.0.1 unless a host is given explicitly
  (``serve_bench`` and ``loopwright sim serve``, checked in /proc/net/tcp).
- YAML is loaded safely: ``!!python/...`` tags are refused with our error and run
  nothing.
- Run-folder names made from serials and procedure names are sanitised: the folder is
  always made directly inside --out.
- The bench caps hold in the procedure check (refused before any output) and in the
  driver layer (SafetyError, nothing sent).
- A real (non-simulated) generator's output needs ``--yes`` without a terminal.
"""

from __future__ import annotations

import io
import json
import os
import socket
import subprocess
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any
from unittest import mock

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rich.console import Console

from loopwright.cli import build_parser, main
from loopwright.errors import InputError, LoopwrightError, SafetyError
from loopwright.instruments import GeneratorCaps, open_instrument
from loopwright.procedure import load_bench, load_procedure
from loopwright.procedure.connect import connect_bench
from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.store.names import MAX_PART_CHARS
from loopwright.store.writer import RunFolder

# A marker that no driver template, init or query contains: if it shows up in the
# traffic, a file string reached an instrument.
MARK = "QZXV"
INJECTIONS = [
    f"{MARK}1;*RST;OUTP1 ON",
    f"{MARK}2 ;SYST:ERR?",
    f"*RST {MARK}3",
    f":SOUR1:VOLT 9.9;{MARK}4",
    f"{MARK}5'\";*IDN?",
    f"{{frequency_hz}}{MARK}6 [/]",
]
#: Multi-line text fields (prompts, description) may hold newlines; rich markup too.
MULTILINE = f"line one [bold red]\n*RST\nSYST:ERR?\nOUTP1 ON\n{MARK}7 :SOUR1:VOLT 9 [/] [/]"


def record_lines(server: Any) -> list[str]:
    """Every line each simulated instrument receives (a probe on the instance)."""
    seen: list[str] = []
    for role, instrument in server.instruments.items():
        original = instrument.respond

        def respond(message: str, _original: Callable = original, _role: str = role) -> Any:
            seen.append(f"{_role}: {message}")
            return _original(message)

        instrument.respond = respond
    return seen


def hardware_bench(path: Path, resources: dict[str, str], *, driver: str | None = None,
                   max_amplitude_vpp: float = 1.0, max_frequency_hz: float = 1.0e6) -> Path:
    """A bench file naming the served instruments by resource string, like hardware."""
    text = f"generator:\n  resource: '{resources['generator']}'\n"
    if driver is not None:
        text += f"  driver: {json.dumps(driver)}\n"
    text += (f"scope:\n  resource: '{resources['scope']}'\n"
             f"timeout_s: 2.0\nmax_amplitude_vpp: {max_amplitude_vpp}\n"
             f"max_frequency_hz: {max_frequency_hz}\n")
    path.write_text(text)
    return path


def q(text: str) -> str:
    """A YAML double-quoted scalar (JSON strings are valid YAML)."""
    return json.dumps(text)


def injected_procedure(path: Path) -> Path:
    """Every string field of a procedure carries a command-looking payload."""
    a, b, c, d, e, f = INJECTIONS
    path.write_text(
        f"name: {q(a)}\n"
        f"description: {q(MULTILINE)}\n"
        "sign: 1\nmethod: broken_loop\n"
        "limits:\n"
        f"  - name: {q(b)}\n    figure: phase_margin_deg\n    min: -180\n    unit: {q(c[:20])}\n"
        f"  - name: {q(d)}\n    figure: crossover_frequency_hz\n    min: 1\n"
        f"    unit: {q(f[:20])}\n"
        "steps:\n"
        f"  - kind: prompt\n    text: {q(MULTILINE)}\n"
        f"  - kind: calibrate_channels\n    label: {q(e)}\n    text: {q(MULTILINE)}\n"
        f"  - kind: sweep\n    label: {q(f)}\n"
        "    frequencies_hz: [1000, 3000, 10000, 30000]\n    amplitude_vpp: 0.2\n"
        "    settle_cycles: 2\n    cycles_per_record: 4\n    min_samples: 256\n")
    return path


# ----------------------------------------------------------------------------- injection


def test_no_file_or_argument_string_reaches_an_instrument(tmp_path, start_sim_bench):
    server = start_sim_bench("rational", switch=None)
    received = record_lines(server)
    procedure = injected_procedure(tmp_path / "procedure.yaml")
    bench = hardware_bench(tmp_path / "bench.yaml", server.resources)
    shown = io.StringIO()
    answers: list[str] = []
    options = RunOptions(
        out_dir=tmp_path / "runs", serial=f"SN;*RST\x01{MARK}8", operator=f"op;*RST {MARK}9",
        station=f"st\n*RST{MARK}0", quiet=False, assume_yes=True, render_report=True,
        input_fn=lambda prompt: answers.append(prompt) or "")
    outcome = run_procedure(procedure, bench, options, Console(file=shown, width=200))
    assert outcome.status == "complete", outcome.reason
    # the strings were used (shown to the operator, recorded) ...
    assert "SYST:ERR?" in shown.getvalue() and len(answers) == 2
    manifest = json.loads((outcome.run_dir / "manifest.json").read_text())
    assert manifest["operator"] == f"op;*RST {MARK}9"
    summary = json.loads((outcome.run_dir / "summary.json").read_text())
    assert [limit["name"] for limit in summary["limits"]] == [INJECTIONS[1], INJECTIONS[3]]
    # ... and none of them reached an instrument
    traffic = (outcome.run_dir / "traffic.log").read_text()
    assert "write" in traffic and len(received) > 20
    assert MARK not in traffic
    assert not any(MARK in line for line in received)
    # an injected command would have left the simulated instruments an error or a reset
    for instrument in server.instruments.values():
        assert len(instrument.errors) == 0
    assert sum("*RST" in line for line in received) == traffic.count("*RST")
    assert not server.bench.generator.output_on


@pytest.mark.parametrize(("field", "yaml_line"), [
    ("name", "name: \"x\\n*RST\"\n"),
    ("steps[0].label", None),
    ("limits[0].name", None),
    ("limits[0].unit", None),
])
def test_a_newline_in_a_one_line_field_is_refused_with_its_line(tmp_path, field, yaml_line):
    """Single-line strings refuse control characters, naming file, line and field."""
    text = (
        "name: ok\nmethod: broken_loop\n"
        "limits:\n  - name: \"pm\"\n    figure: phase_margin_deg\n    min: 30\n"
        "    unit: \"deg\"\n"
        "steps:\n  - kind: sweep\n    label: \"fine\"\n    frequencies_hz: [1000]\n"
        "    amplitude_vpp: 0.1\n")
    if yaml_line is not None:
        text = text.replace("name: ok\n", yaml_line)
    else:
        old = {"steps[0].label": "label: \"fine\"", "limits[0].name": "name: \"pm\"",
               "limits[0].unit": "unit: \"deg\""}[field]
        text = text.replace(old, old[:-1] + "\\n*RST;OUTP1 ON\"")
    path = tmp_path / "p.yaml"
    path.write_text(text)
    with pytest.raises(InputError) as caught:
        load_procedure(path)
    error = caught.value
    assert error.path == str(path) and error.field == field and error.line is not None
    assert "control" in error.message
    line_text = text.splitlines()[error.line - 1]
    assert "*RST" in line_text or "name: \"x" in line_text


def test_a_driver_name_with_commands_is_refused_and_not_sent(tmp_path, start_sim_bench):
    """The bench's driver field is a name or a file, never text for the instrument."""
    server = start_sim_bench("rational", switch=None)
    received = record_lines(server)
    bench = load_bench(hardware_bench(tmp_path / "bench.yaml", server.resources,
                                      driver=f"generator-source-tree;*RST;{MARK}"))
    with pytest.raises(LoopwrightError, match="no driver named"):
        connect_bench(bench, tmp_path / "traffic.log")
    assert received and not any(MARK in line for line in received)
    assert MARK not in (tmp_path / "traffic.log").read_text()


# ----------------------------------------------------------------------------- loopback


def listening_addresses(port: int) -> set[str]:
    """Local IPv4 addresses with a socket listening on ``port`` (from /proc/net/tcp)."""
    found = set()
    for line in Path("/proc/net/tcp").read_text().splitlines()[1:]:
        parts = line.split()
        address, port_hex = parts[1].split(":")
        if int(port_hex, 16) == port and parts[3] == "0A":  # 0A = LISTEN
            packed = bytes.fromhex(address)[::-1]
            found.add(socket.inet_ntoa(packed))
    return found


pytestmark_linux = pytest.mark.skipif(not Path("/proc/net/tcp").exists(),
                                      reason="reads /proc/net/tcp")


@pytestmark_linux
def test_serve_bench_listens_on_loopback_only(sim_bench):
    for server in sim_bench.servers.values():
        assert listening_addresses(server.port) == {"127.0.0.1"}
        assert server.resource.startswith("TCPIP0::127.0.0.1::")


@pytestmark_linux
def test_serve_bench_takes_an_explicit_host(start_sim_bench):
    from mock_instruments.bench import SimulatedBench
    from mock_instruments.duts import load_dut
    from mock_instruments.server import serve_bench

    with serve_bench(SimulatedBench(load_dut("rational")), host="127.0.0.2") as server:
        for instrument_server in server.servers.values():
            assert listening_addresses(instrument_server.port) == {"127.0.0.2"}


def test_sim_serve_defaults_to_loopback():
    args = build_parser().parse_args(["sim", "serve"])
    assert args.host == "127.0.0.1"


@pytestmark_linux
def test_sim_serve_process_listens_on_loopback_only():
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    process = subprocess.Popen(
        [sys.executable, "-m", "loopwright", "sim", "serve", "--json"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True,
        env=env)
    try:
        box: list[str] = []
        reader = threading.Thread(target=lambda: box.append(process.stdout.readline()),
                                  daemon=True)
        reader.start()
        reader.join(60)
        assert box, "sim serve printed nothing"
        summary = json.loads(box[0])
        assert summary["host"] == "127.0.0.1"
        for resource in summary["resources"].values():
            port = int(resource.split("::")[2])
            assert listening_addresses(port) == {"127.0.0.1"}
    finally:
        process.terminate()
        process.communicate(timeout=30)


# ----------------------------------------------------------------------------- safe YAML

PYTHON_TAGS = [
    "!!python/object/apply:os.system ['touch {flag}']",
    "!!python/object/new:os.system ['touch {flag}']",
    "!!python/object:os.system {{}}",
    "!!python/name:os.system",
    "!!python/module:os",
]


@pytest.mark.parametrize("tag", PYTHON_TAGS)
@pytest.mark.parametrize("kind", ["procedure", "bench", "driver", "dut"])
def test_python_tags_are_refused_and_run_nothing(tmp_path, capsys, kind, tag):
    flag = tmp_path / "pwned"
    path = tmp_path / f"{kind}.yaml"
    value = tag.format(flag=flag)
    path.write_text(f"# a file with a Python tag\nname: {value}\nrole: generator\n"
                    f"model: rational\nmax_amplitude_vpp: {value}\n")
    args = {
        "procedure": ["run", str(path), "--bench", str(path)],
        "bench": ["run", str(path), "--bench", str(path)],
        "driver": ["drivers", "check", str(path)],
        "dut": ["sim", "serve", "--dut", str(path)],
    }[kind]
    capsys.readouterr()
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"loopwright: error: {path}:2: ") and err.count("\n") == 1, err
    assert not flag.exists()


# ----------------------------------------------------------------------------- folders

hostile_text = st.one_of(
    st.text(max_size=300),
    st.sampled_from(["..", "../..", "/", "/etc/passwd", "..\\..\\win", ".hidden", "", " ",
                     "a/../../b", "\x00", "\n", "\u202e", "😀" * 100, "CON", "-rf", "~"]),
    st.lists(st.sampled_from(["..", "/", "\\", ".", "x", "\x00", "\x1b[31m", "é"]),
             max_size=40).map("".join),
)


@settings(max_examples=150, deadline=None, derandomize=True)
@given(procedure_name=hostile_text, serial=hostile_text)
def test_run_folder_is_always_directly_inside_out(tmp_path_factory, procedure_name, serial):
    root = tmp_path_factory.mktemp("runs")
    folder = RunFolder.create(root, procedure_name, serial, {})
    try:
        path = folder.path
        assert path.parent == root and path.is_dir()
        assert path.resolve().parent == root.resolve()
        name = path.name
        assert not name.startswith(".")
        assert all(ch.isascii() and (ch.isalnum() or ch in "._-") for ch in name), name
        assert len(name) <= 16 + 2 * (MAX_PART_CHARS + 1) + 6
        assert [p.name for p in root.iterdir()] == [name]
    finally:
        folder.close()


def test_run_with_hostile_names_stays_inside_out(tmp_path, capsys):
    """End to end through the CLI on the simulated bench: ../ in name and serial."""
    procedure = tmp_path / "p.yaml"
    procedure.write_text(
        "name: \"../../../escaped/..\"\nmethod: broken_loop\nsteps:\n"
        "  - kind: sweep\n    frequencies_hz: [1000, 2000]\n    amplitude_vpp: 0.1\n"
        "    settle_cycles: 1\n    cycles_per_record: 4\n    min_samples: 256\n")
    bench = tmp_path / "bench.yaml"
    bench.write_text("simulated:\n  dut: rational\n  seed: 1\n"
                     "max_amplitude_vpp: 1.0\nmax_frequency_hz: 1.0e6\n")
    out = tmp_path / "deep" / "runs"
    code = main(["run", str(procedure), "--bench", str(bench), "--out", str(out),
                 "--serial", "../../..\\x/\x01y", "--quiet", "--no-report"])
    assert code == 0, capsys.readouterr().err
    made = list(out.iterdir())
    assert len(made) == 1 and made[0].is_dir()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bench.yaml", "deep", "p.yaml"]
    assert sorted(p.name for p in (tmp_path / "deep").iterdir()) == ["runs"]


# ----------------------------------------------------------------------------- caps


def over_cap_procedure(path: Path, *, amplitude_vpp: float = 0.2,
                       frequency_hz: float = 1000.0) -> Path:
    path.write_text(
        "name: over-cap\nmethod: broken_loop\nsteps:\n"
        f"  - kind: sweep\n    frequencies_hz: [500, {frequency_hz}]\n"
        f"    amplitude_vpp: {amplitude_vpp}\n"
        "    settle_cycles: 1\n    cycles_per_record: 4\n    min_samples: 256\n")
    return path


@pytest.mark.parametrize(("amplitude_vpp", "frequency_hz", "words"), [
    (1.5, 1000.0, "max_amplitude_vpp"),
    (0.2, 2.0e6, "max_frequency_hz"),
])
def test_procedure_above_a_cap_is_refused_before_any_output(
        tmp_path, start_sim_bench, amplitude_vpp, frequency_hz, words):
    server = start_sim_bench("rational", switch=None)
    received = record_lines(server)
    procedure = over_cap_procedure(tmp_path / "p.yaml", amplitude_vpp=amplitude_vpp,
                                   frequency_hz=frequency_hz)
    bench = hardware_bench(tmp_path / "bench.yaml", server.resources)
    with pytest.raises(SafetyError, match=words) as caught:
        run_procedure(procedure, bench, RunOptions(out_dir=tmp_path / "runs", quiet=True,
                                                   assume_yes=True, render_report=False))
    assert str(procedure) in str(caught.value)
    assert received == []  # not even *IDN?: nothing was opened
    assert not server.bench.generator.output_on
    assert not (tmp_path / "runs").exists()


@pytest.mark.parametrize(("call", "args"), [
    ("set_sine", (2.0e5, 0.5, 0.0)),
    ("set_sine", (1.0e3, 1.5, 0.0)),
    ("set_sine", (1.0e3, 0.5, 0.9)),
    ("set_frequency", (1.0e5 * (1 + 1e-12),)),
    ("set_amplitude", (1.0000001,)),
    ("set_amplitude", (float("inf"),)),
])
def test_driver_layer_refuses_values_above_the_caps(tmp_path, start_sim_bench, call, args):
    """Called directly (not through the runner), the generator still enforces the caps."""
    server = start_sim_bench("rational", switch=None)
    log = tmp_path / "traffic.log"
    caps = GeneratorCaps(max_amplitude_vpp=1.0, max_frequency_hz=1.0e5, max_peak_v=1.0)
    generator = open_instrument(server.resources["generator"], "generator", caps=caps,
                                timeout_s=2.0, traffic_log=log)
    try:
        generator.set_sine(1.0e3, 0.2, 0.0)
        before = log.read_text()
        state = server.bench.generator
        frequency, amplitude = state.frequency_hz, state.amplitude_vpp
        with pytest.raises(LoopwrightError, match=r"above|below|finite") as caught:
            getattr(generator, call)(*args)
        if math_finite(args):
            assert isinstance(caught.value, SafetyError)
        assert "nothing was sent" in str(caught.value)
        assert log.read_text() == before
        assert (state.frequency_hz, state.amplitude_vpp) == (frequency, amplitude)
    finally:
        generator.close()


def math_finite(values: tuple[float, ...]) -> bool:
    return all(abs(v) != float("inf") for v in values)


def test_bench_caps_reach_the_driver_layer(tmp_path, start_sim_bench):
    """connect_bench gives the generator the bench file's caps, not just the check."""
    server = start_sim_bench("rational", switch=None)
    bench = load_bench(hardware_bench(tmp_path / "bench.yaml", server.resources,
                                      max_amplitude_vpp=0.3, max_frequency_hz=5.0e4))
    connection = connect_bench(bench, tmp_path / "traffic.log")
    try:
        with pytest.raises(SafetyError, match=r"0\.3 Vpp"):
            connection.generator.set_sine(1.0e3, 0.31, 0.0)
        with pytest.raises(SafetyError, match="50000 Hz"):
            connection.generator.set_sine(5.1e4, 0.1, 0.0)
        assert connection.generator.max_amplitude_vpp == pytest.approx(0.3)
        assert not server.bench.generator.output_on
    finally:
        connection.close()


# ----------------------------------------------------------------------------- --yes


def run_cli_process(procedure: Path, bench: Path, out: Path, *extra: str
                    ) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    return subprocess.run(
        [sys.executable, "-m", "loopwright", "run", str(procedure), "--bench", str(bench),
         "--out", str(out), "--no-report", "--quiet", *extra],
        stdin=subprocess.DEVNULL, capture_output=True, text=True, env=env, timeout=120)


def test_real_generator_without_a_terminal_needs_yes(tmp_path, start_sim_bench):
    server = start_sim_bench("rational", switch=None)
    received = record_lines(server)
    procedure = over_cap_procedure(tmp_path / "p.yaml")
    bench = hardware_bench(tmp_path / "bench.yaml", server.resources)
    out = tmp_path / "runs"
    refused = run_cli_process(procedure, bench, out)
    assert refused.returncode == 2, refused.stderr
    assert refused.stderr.startswith("loopwright: error: ") and "--yes" in refused.stderr
    assert refused.stderr.count("\n") == 1 and "Traceback" not in refused.stderr
    assert received == [] and not out.exists()
    allowed = run_cli_process(procedure, bench, out, "--yes")
    assert allowed.returncode == 0, allowed.stderr
    assert any("OUTP1 ON" in line for line in received)
    assert not server.bench.generator.output_on
    assert len(list(out.iterdir())) == 1


def test_markup_in_file_strings_is_shown_as_text(tmp_path, capsys):
    """Labels and limit names are printed as written, never read as rich markup."""
    procedure = tmp_path / "p.yaml"
    procedure.write_text(
        "name: markup\nmethod: broken_loop\nlimits:\n"
        "  - name: \"[bold red]pm[/] [/]\"\n    figure: phase_margin_deg\n    min: -180\n"
        "steps:\n  - kind: sweep\n    label: \"[link=x]sweep[/link] [/]\"\n"
        "    frequencies_hz: [1000, 2000, 4000]\n    amplitude_vpp: 0.1\n"
        "    settle_cycles: 1\n    cycles_per_record: 4\n    min_samples: 256\n")
    bench = tmp_path / "bench.yaml"
    bench.write_text("simulated:\n  dut: rational\n  seed: 1\n"
                     "max_amplitude_vpp: 1.0\nmax_frequency_hz: 1.0e6\n")
    code = main(["run", str(procedure), "--bench", str(bench), "--out",
                 str(tmp_path / "runs [x]"), "--no-report"])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert "[link=x]sweep[/link] [/]" in out
    assert "[bold red]pm[/] [/]" in out


def test_batch_serials_with_markup_stay_text(tmp_path, capsys):
    """A scanned serial is data: '[/]' is a serial, not a markup tag (it crashed before)."""
    procedure = tmp_path / "p.yaml"
    procedure.write_text(
        "name: batch\nmethod: broken_loop\nsteps:\n  - kind: sweep\n"
        "    frequencies_hz: [1000, 2000, 4000]\n    amplitude_vpp: 0.1\n"
        "    settle_cycles: 1\n    cycles_per_record: 4\n    min_samples: 256\n")
    bench = tmp_path / "bench.yaml"
    bench.write_text("simulated:\n  dut: rational\n  seed: 1\n"
                     "max_amplitude_vpp: 1.0\nmax_frequency_hz: 1.0e6\n")
    scanned = io.StringIO("[/]\n[bold]" + "y" * 200 + "[/]\n\n")
    with mock.patch.object(sys, "stdin", scanned):
        code = main(["batch", str(procedure), "--bench", str(bench), "--out",
                     str(tmp_path / "out")])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert "board [/]" in out and "at most 128" in out
    assert len([p for p in (tmp_path / "out").iterdir() if p.is_dir()]) == 1


# Numbers out of range on the command line end in our one-line error (exit 2) before
# anything is opened; each of these was a traceback (numpy seed, VISA timeout, pydantic).
@pytest.mark.parametrize("argv", [
    ["identify", "TCPIP::127.0.0.1::1::SOCKET", "--timeout", "-1"],
    ["identify", "TCPIP::127.0.0.1::1::SOCKET", "--timeout", "nan"],
    ["identify", "TCPIP::127.0.0.1::1::SOCKET", "--timeout", "1e300"],
    ["sim", "serve", "--seed", "-1"],
    ["replay", "{run}", "--seed", "-3"],
    ["replay", "{run}", "--step", "-1"],
], ids=["timeout-negative", "timeout-nan", "timeout-huge", "sim-seed", "replay-seed",
        "replay-step"])
def test_out_of_range_options_end_in_our_error(argv, tmp_path, capsys):
    run = tmp_path / "run"
    run.mkdir()
    code = main([a.format(run=run) for a in argv])
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.startswith("loopwright: error: --") and err.count("\n") == 1, err
    assert not any(p.name != "run" for p in tmp_path.iterdir())
