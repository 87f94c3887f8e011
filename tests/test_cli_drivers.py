"""`loopwright drivers list|check` and `loopwright identify` through the real CLI."""

from __future__ import annotations

import socket

import pytest

from loopwright.cli import main
from loopwright.resources import data_dir

GOOD = """\
name: my-generator
role: generator
dialect: my-tree
match: {idn: 'my generator'}
error_query: 'SYST:ERR?'
values:
  frequency_hz: {min: 1, max: 1.0e6}
  amplitude_vpp: {min: 0.01, max: 5}
  offset_v: {min: -2, max: 2}
commands:
  select_sine: 'FUNC SIN'
  set_frequency: 'FREQ {frequency_hz}'
  set_amplitude: 'AMPL {amplitude_vpp}'
  set_offset: 'OFFS {offset_v}'
  set_output: 'OUTP {output}'
readback:
  frequency_hz: 'FREQ?'
  amplitude_vpp: 'AMPL?'
  offset_v: 'OFFS?'
  output: {query: 'OUTP?', true_replies: ['1'], false_replies: ['0']}
"""

# (replace this, with that, expected "file:LINE: field: message" pieces)
BROKEN = [
    ("  set_offset: 'OFFS {offset_v}'\n", "  set_ofset: 'OFFS {offset_v}'\n",
     14, "commands.set_ofset", "did you mean 'set_offset'"),
    ("  amplitude_vpp: {min: 0.01, max: 5}\n", "  amplitude_vpp: {min: 0.01}\n",
     8, "values.amplitude_vpp", "max is required"),
    ("  set_amplitude: 'AMPL {amplitude_vpp}'\n", "  set_amplitude: 'AMPL {ampl}'\n",
     13, "commands.set_amplitude", "not allowed here"),
    ("role: generator\n", "role: oscillator\n", 2, "role", "role must be one of"),
    ("match: {idn: 'my generator'}\n", "match: {idn: 'my (generator'}\n",
     4, "match", "not a valid regular expression"),
    ("  offset_v: {min: -2, max: 2}\n", "  offset_v: {min: 2, max: -2}\n",
     9, "values.offset_v", "is above max"),
    ("  output: {query: 'OUTP?', true_replies: ['1'], false_replies: ['0']}\n",
     "  output: {query: 'OUTP?', true_replies: [ON], false_replies: ['0']}\n",
     20, "readback.output.true_replies[0]", "quote the word"),
    ("error_query: 'SYST:ERR?'\n", "error_query: 'SYST:ERR?'\nerror_query: 'X?'\n",
     6, "error_query", "duplicate key"),
]


def test_drivers_list_shows_shipped_dialects(capsys):
    assert main(["drivers", "list"]) == 0
    out = capsys.readouterr().out
    for name, role in [("generator-source-tree", "generator"),
                       ("generator-output-tree", "generator"), ("scope-block", "scope"),
                       ("scope-text", "scope"), ("switch-relay", "switch")]:
        line = next(x for x in out.splitlines() if x.startswith(name + " "))
        assert role in line and str(data_dir("drivers") / f"{name}.yaml") in line


def test_drivers_list_with_user_folder(tmp_path, capsys):
    (tmp_path / "mine.yaml").write_text(GOOD)
    assert main(["drivers", "list", "--drivers", str(tmp_path)]) == 0
    assert "my-generator" in capsys.readouterr().out


def test_drivers_check_good_files(tmp_path, capsys):
    path = tmp_path / "good.yaml"
    path.write_text(GOOD)
    shipped = sorted(str(p) for p in data_dir("drivers").glob("*.yaml"))
    assert main(["drivers", "check", str(path), *shipped]) == 0
    out = capsys.readouterr().out
    assert out.count(": ok (") == 1 + len(shipped)


@pytest.mark.parametrize(("old", "new", "line", "field", "message"), BROKEN)
def test_drivers_check_broken_file_names_line_and_field(tmp_path, capsys, old, new, line,
                                                        field, message):
    assert old in GOOD
    path = tmp_path / "broken.yaml"
    path.write_text(GOOD.replace(old, new))
    assert main(["drivers", "check", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"loopwright: error: {path}:{line}: {field}: "), err
    assert message in err
    assert "\n" not in err  # one line, no traceback


# ------------------------------------------------------------------- identify
@pytest.fixture
def idn_server(scpi_recorder):
    """The recording server of ``tests/scpi_recorder.py`` as a text-dialect scope."""
    scpi_recorder.identity = "loopwright,simulated scope (scope-text),SIM-cli,0.1"
    return scpi_recorder


def test_identify_prints_identity_and_driver(idn_server, capsys):
    resource = idn_server.resource
    assert main(["identify", resource]) == 0
    out = capsys.readouterr().out
    assert f"identity  {idn_server.identity}" in out
    assert "driver    scope-text (scope," in out


def test_identify_unknown_instrument_exit_1(idn_server, capsys):
    idn_server.identity = "someone,box,1,1"
    resource = idn_server.resource
    assert main(["identify", resource]) == 1
    assert "none matches" in capsys.readouterr().out


def test_identify_dead_port_one_line_error(visa_rm, capsys):
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()
    assert main(["identify", f"TCPIP0::127.0.0.1::{port}::SOCKET", "--timeout", "1"]) == 1
    err = capsys.readouterr().err.strip()
    assert err.startswith("loopwright: error: TCPIP0::127.0.0.1::") and "\n" not in err
