"""Declarative drivers: the exact SCPI strings each shipped dialect sends (as written in
drivers/DIALECTS.md), values refused before anything is sent, the Python escape hatch.

Real pyvisa-py sessions over loopback TCP to a small recording SCPI server: it stores
``HEADER value`` commands and answers ``HEADER?`` from them, keeps an error queue, and
takes per-test canned replies (``tests/scpi_recorder.py``, fixture ``scpi_recorder``).
"""

from __future__ import annotations

import math
import sys
import textwrap

import numpy as np
import pytest

from loopwright.errors import DriverError, InputError, SafetyError, SCPIError
from loopwright.instruments import (
    ChannelSettings,
    Generator,
    GeneratorCaps,
    LoopSwitch,
    Scope,
    TemplateGenerator,
    driver_class,
    encode_samples,
    find_drivers,
    get_driver,
    load_driver,
    open_instrument,
)
from loopwright.instruments.template_roles import format_number


def _simulated(role: str, dialect: str) -> str:
    # the identity form of drivers/DIALECTS.md, "Simulated identities"
    return f"loopwright,simulated {role} ({dialect}),SIM-test,0.1"


# ------------------------------------------------------------------ generators
def test_generator_source_tree_exact_commands(scpi_recorder):
    scpi_recorder.identity = _simulated("generator", "generator-source-tree")
    scpi_recorder.state["SOUR1:VOLT"] = "1"
    gen = open_instrument(scpi_recorder.resource, "generator", timeout_s=2.0)
    assert isinstance(gen, Generator)
    assert gen.driver_name == "generator-source-tree"
    assert gen.identity == scpi_recorder.identity
    assert scpi_recorder.commands == ["*IDN?", "*CLS", "SOUR1:VOLT:UNIT VPP", "SYST:ERR?"]
    mark = len(scpi_recorder.commands)
    gen.set_sine(1000.0, 0.5, 0.25)
    # amplitude shrinks (1 -> 0.5): amplitude, then offset, then frequency
    assert scpi_recorder.sent_since(mark) == [
        "SOUR1:VOLT?", "SOUR1:FUNC SIN", "SOUR1:VOLT 0.5", "SOUR1:VOLT:OFFS 0.25",
        "SOUR1:FREQ 1000", "SYST:ERR?"]
    mark = len(scpi_recorder.commands)
    gen.set_frequency(12345.678901)
    gen.set_frequency(1.5e7)
    gen.set_amplitude(0.002)
    gen.set_output(True)
    assert scpi_recorder.sent_since(mark) == [
        "SOUR1:FREQ 12345.6789", "SYST:ERR?", "SOUR1:FREQ 15000000", "SYST:ERR?",
        "SOUR1:VOLT 0.002", "SYST:ERR?", "OUTP1 ON", "SYST:ERR?"]
    settings = gen.read_settings()
    assert settings.frequency_hz == 1.5e7 and settings.amplitude_vpp == 0.002
    assert settings.offset_v == 0.25 and settings.output_on is True
    assert gen.max_frequency_hz == 20e6 and gen.max_amplitude_vpp == 10.0
    mark = len(scpi_recorder.commands)
    gen.close()
    assert scpi_recorder.sent_since(mark) == ["OUTP1 OFF", "SYST:ERR?"]


def test_generator_output_tree_exact_commands(scpi_recorder):
    scpi_recorder.identity = _simulated("generator", "generator-output-tree")
    scpi_recorder.state["OUTP:CH1:AMPL"] = "0.1"
    gen = open_instrument(scpi_recorder.resource, "generator", timeout_s=2.0)
    assert gen.driver_name == "generator-output-tree"
    mark = len(scpi_recorder.commands)
    gen.set_sine(250e3, 4.0, -1.5)
    # amplitude grows (0.1 -> 4): frequency, then offset, then amplitude
    assert scpi_recorder.sent_since(mark) == [
        "OUTP:CH1:AMPL?", "OUTP:CH1:SHAP SINE", "OUTP:CH1:FREQ 250000",
        "OUTP:CH1:DCOF -1.5", "OUTP:CH1:AMPL 4", "SYST:ERR:NEXT?"]
    mark = len(scpi_recorder.commands)
    gen.set_output(True)
    assert gen.read_settings().output_on is True
    gen.set_output(False)
    assert scpi_recorder.sent_since(mark) == [
        "OUTP:CH1:ENAB 1", "SYST:ERR:NEXT?", "OUTP:CH1:FREQ?", "OUTP:CH1:AMPL?",
        "OUTP:CH1:DCOF?", "OUTP:CH1:ENAB?", "OUTP:CH1:ENAB 0", "SYST:ERR:NEXT?"]
    gen.close()


BAD_GENERATOR_CALLS = [
    ("set_frequency", (30e6,)),           # above 20 MHz
    ("set_frequency", (0.0,)),            # below 1 mHz
    ("set_frequency", (math.nan,)),
    ("set_frequency", (math.inf,)),
    ("set_frequency", (True,)),
    ("set_frequency", ("1000",)),
    ("set_frequency", ("1000;*RST",)),
    ("set_frequency", ("1000\n*RST",)),
    ("set_frequency", ("*RST",)),
    ("set_amplitude", (11.0,)),
    ("set_amplitude", ("1;*RST",)),
    ("set_sine", (1000.0, 9.0, 1.0)),     # |offset| + amplitude/2 = 5.5 V > 5 V
    ("set_sine", (1000.0, 1.0, "0;*RST")),
    ("set_output", ("ON",)),
    ("set_output", ("on;*RST",)),
    ("set_output", (1,)),
]


@pytest.mark.parametrize(("method", "args"), BAD_GENERATOR_CALLS)
def test_generator_refuses_before_sending(scpi_recorder, method, args):
    scpi_recorder.identity = _simulated("generator", "generator-source-tree")
    scpi_recorder.state["SOUR1:VOLT"] = "1"
    with open_instrument(scpi_recorder.resource, "generator", timeout_s=2.0) as gen:
        mark = len(scpi_recorder.commands)
        with pytest.raises(DriverError):
            getattr(gen, method)(*args)
        assert scpi_recorder.sent_since(mark) == []


def test_bench_caps_raise_safety_error_before_sending(scpi_recorder):
    scpi_recorder.identity = _simulated("generator", "generator-source-tree")
    caps = GeneratorCaps(max_amplitude_vpp=1.0, max_frequency_hz=1e5, max_peak_v=1.0)
    with open_instrument(scpi_recorder.resource, "generator", timeout_s=2.0, caps=caps) as gen:
        assert gen.max_amplitude_vpp == 1.0 and gen.max_frequency_hz == 1e5
        mark = len(scpi_recorder.commands)
        for call in (lambda: gen.set_amplitude(1.5), lambda: gen.set_frequency(2e5),
                     lambda: gen.set_sine(1e3, 1.0, 0.6)):
            with pytest.raises(SafetyError):
                call()
        assert scpi_recorder.sent_since(mark) == []


def test_instrument_error_queue_raises_scpi_error(scpi_recorder):
    scpi_recorder.identity = _simulated("generator", "generator-source-tree")
    scpi_recorder.reject["SOUR1:FREQ 1000"] = '-222,"Data out of range"'
    with open_instrument(scpi_recorder.resource, "generator", timeout_s=2.0) as gen:
        with pytest.raises(SCPIError) as info:
            gen.set_frequency(1000.0)
        assert info.value.code == -222 and info.value.text == "Data out of range"
        assert "SOUR1:FREQ 1000" in str(info.value)


# ---------------------------------------------------------------------- scopes
def test_scope_block_exact_commands_and_volts(scpi_recorder):
    scpi_recorder.identity = _simulated("scope", "scope-block")
    codes = {1: np.array([0, 1000, -1000, 32766, 5], dtype=np.int16),
             2: np.array([0, 32767, -3, 4, 0x0A0A], dtype=np.int16)}
    scpi_recorder.replies["WAV:PRE?"] = "5,1e-06,0,0.001,0.5,0"
    scpi_recorder.replies["WAV:DATA?"] = lambda: encode_samples(
        codes[int(scpi_recorder.state["WAV:SOUR"][-1])], "int16", "little")
    scpi_recorder.replies["TIM:SRAT?"] = "1000000"
    scope = open_instrument(scpi_recorder.resource, "scope", timeout_s=2.0)
    assert isinstance(scope, Scope) and scope.driver_name == "scope-block"
    assert scpi_recorder.commands == ["*IDN?", "*CLS", "WAV:FORM INT16", "WAV:ORD LSBF",
                                 "SYST:ERR?"]
    mark = len(scpi_recorder.commands)
    wide = ChannelSettings(scale_v_per_div=10.0, offset_v=0.0, coupling="DC")
    scope.set_channel(1, ChannelSettings(0.5, 0.1, "AC", 10.0))
    scope.set_channel(1, wide)
    scope.set_channel(2, wide)
    assert scope.set_timebase(1000, 1.2e6) == 1e6
    scope.set_trigger(1, -0.25, "fall")
    capture = scope.acquire(np.array([1, 2]))  # any sequence of channel numbers
    assert scpi_recorder.sent_since(mark) == [
        "CHAN1:PROB 10", "CHAN1:SCAL 0.5", "CHAN1:OFFS 0.1", "CHAN1:COUP AC", "SYST:ERR?",
        "CHAN1:PROB 1", "CHAN1:SCAL 10", "CHAN1:OFFS 0", "CHAN1:COUP DC", "SYST:ERR?",
        "CHAN2:PROB 1", "CHAN2:SCAL 10", "CHAN2:OFFS 0", "CHAN2:COUP DC", "SYST:ERR?",
        "TIM:POIN 1000", "TIM:SRAT 1200000", "SYST:ERR?", "TIM:SRAT?",
        "TRIG:SOUR CHAN1", "TRIG:LEV -0.25", "TRIG:SLOP FALL", "SYST:ERR?",
        "ACQ:SING", "*OPC?",
        "WAV:SOUR CHAN1", "WAV:PRE?", "WAV:DATA?",
        "WAV:SOUR CHAN2", "WAV:PRE?", "WAV:DATA?", "SYST:ERR?"]
    assert capture.sample_rate_hz == pytest.approx(1e6)
    # volts = (code - y_reference) * y_increment + y_origin (DIALECTS.md, scope-block)
    np.testing.assert_allclose(capture.volts[1], codes[1] * 0.001 + 0.5)
    np.testing.assert_allclose(capture.volts[2], codes[2] * 0.001 + 0.5)
    assert capture.settings[1] == wide
    assert not capture.clipped(1)
    assert capture.adc_clipped[2] and capture.clipped(2)  # code 32767 = ADC top
    scope.close()


def test_scope_text_exact_commands_and_polling(scpi_recorder):
    scpi_recorder.identity = _simulated("scope", "scope-text")
    done = iter(["0", "0", "1"])
    scpi_recorder.replies[":ACQ:DONE?"] = lambda: next(done)
    scpi_recorder.replies[":TRAC? INP1"] = "1.0000000e-01,-2.0000000e-01,3.0000000e-01"
    scpi_recorder.replies[":TRAC? INP2"] = "0.0000000e+00,5.0000000e-01,-5.0000000e-01"
    scpi_recorder.replies[":TRAC:XINC?"] = "2e-09"
    scpi_recorder.replies[":ACQ:RATE?"] = "500000000"
    scope = open_instrument(scpi_recorder.resource, "scope", timeout_s=2.0)
    assert scope.driver_name == "scope-text"
    mark = len(scpi_recorder.commands)
    scope.set_channel(2, ChannelSettings(0.25, -1.0, "DC", 10.0))
    assert scope.set_timebase(200, 4e8) == 5e8
    scope.set_trigger(2, 0.0, "rise")
    capture = scope.acquire([1, 2])
    assert scpi_recorder.sent_since(mark) == [
        ":INP2:ATT 10", ":INP2:RANG 2", ":INP2:OFFS -1", ":INP2:COUP DC", ":SYST:ERR?",
        ":ACQ:LENG 200", ":ACQ:RATE 400000000", ":SYST:ERR?", ":ACQ:RATE?",
        ":TRIG:SRC INP2", ":TRIG:THR 0", ":TRIG:EDGE RISE", ":SYST:ERR?",
        ":ACQ:ARM", ":ACQ:DONE?", ":ACQ:DONE?", ":ACQ:DONE?",
        ":TRAC? INP1", ":TRAC:XINC?", ":TRAC? INP2", ":TRAC:XINC?", ":SYST:ERR?"]
    np.testing.assert_allclose(capture.volts[1], [0.1, -0.2, 0.3])
    assert capture.sample_rate_hz == pytest.approx(5e8)
    assert 1 not in capture.settings and capture.settings[2].scale_v_per_div == 0.25
    scope.close()


def test_scope_limits_scale_with_probe_ratio(scpi_recorder):
    # scale and offset are at the probe tip; their limits hold at the input (DIALECTS.md)
    scpi_recorder.identity = _simulated("scope", "scope-block")
    with open_instrument(scpi_recorder.resource, "scope", timeout_s=2.0) as scope:
        mark = len(scpi_recorder.commands)
        scope.set_channel(1, ChannelSettings(50.0, -300.0, "DC", 10.0))
        assert scpi_recorder.sent_since(mark)[:3] == ["CHAN1:PROB 10", "CHAN1:SCAL 50",
                                                 "CHAN1:OFFS -300"]
        mark = len(scpi_recorder.commands)
        with pytest.raises(DriverError, match="above the limit 100"):
            scope.set_channel(1, ChannelSettings(101.0, 0.0, "DC", 10.0))
        assert scpi_recorder.sent_since(mark) == []


BAD_SCOPE_CALLS = [
    ("set_channel", (3, ChannelSettings(1.0))),               # no channel 3
    ("set_channel", (True, ChannelSettings(1.0))),
    ("set_channel", ("1;*RST", ChannelSettings(1.0))),
    ("set_channel", (1, ChannelSettings(20.0))),              # above 10 V/div
    ("set_channel", (1, ChannelSettings(1.0, coupling="AC;*RST"))),
    ("set_channel", (1, ChannelSettings(1.0, coupling="AC\n*RST"))),
    ("set_channel", (1, ChannelSettings(1.0, coupling="*RST"))),
    ("set_channel", (1, ChannelSettings(1.0, coupling="ac"))),
    ("set_channel", (1, ChannelSettings(1.0, offset_v="0;*RST"))),
    ("set_channel", (1, ChannelSettings(1.0, probe_attenuation="10;*RST"))),
    ("set_channel", (1, ChannelSettings(1.0, offset_v=60.0))),            # above 50 V
    ("set_timebase", (1000.5, 1e6)),                          # not a whole number
    ("set_timebase", (50, 1e6)),                              # below 100 points
    ("set_timebase", (1000, 2e9)),                            # above 1 GS/s
    ("set_timebase", ("1000;*RST", 1e6)),
    ("set_trigger", (1, 0.0, "RISE")),
    ("set_trigger", (1, 0.0, "rise;*RST")),
    ("set_trigger", (1, "0\n*RST", "rise")),
    ("acquire", ([1, 5],)),
    ("acquire", (["1;*RST"],)),
    ("acquire", ([],)),
    ("acquire", (1,)),
]


@pytest.mark.parametrize(("method", "args"), BAD_SCOPE_CALLS)
def test_scope_refuses_before_sending(scpi_recorder, method, args):
    scpi_recorder.identity = _simulated("scope", "scope-block")
    with open_instrument(scpi_recorder.resource, "scope", timeout_s=2.0) as scope:
        mark = len(scpi_recorder.commands)
        with pytest.raises(DriverError):
            getattr(scope, method)(*args)
        assert scpi_recorder.sent_since(mark) == []


# ---------------------------------------------------------------------- switch
def test_switch_relay_exact_commands(scpi_recorder):
    scpi_recorder.identity = _simulated("switch", "switch-relay")
    scpi_recorder.replies["ROUT:STAT? 1"] = "1"
    switch = open_instrument(scpi_recorder.resource, "switch", timeout_s=2.0)
    assert isinstance(switch, LoopSwitch) and switch.driver_name == "switch-relay"
    mark = len(scpi_recorder.commands)
    switch.set_closed(True)
    assert switch.read_closed() is True
    switch.close()
    assert scpi_recorder.sent_since(mark) == ["ROUT:CLOS 1", "SYST:ERR?", "ROUT:STAT? 1",
                                         "ROUT:OPEN 1", "SYST:ERR?",
                                         "ROUT:OPEN 2", "SYST:ERR?"]
    with pytest.raises(DriverError):
        switch.set_closed("1;*RST")


# ---------------------------------------------------------------- selection
def test_driver_by_name_and_no_match(scpi_recorder):
    scpi_recorder.identity = "someone,unknown box,1,1"
    with pytest.raises(DriverError, match="no generator driver matches"):
        open_instrument(scpi_recorder.resource, "generator", timeout_s=2.0)
    with open_instrument(scpi_recorder.resource, "generator", driver="generator-output-tree",
                         timeout_s=2.0) as gen:
        assert gen.driver_name == "generator-output-tree"
    with pytest.raises(DriverError, match="is a scope driver"):
        open_instrument(scpi_recorder.resource, "generator", driver="scope-text", timeout_s=2.0)


def test_user_folders_from_option_and_environment(tmp_path, monkeypatch):
    text = (get_driver("generator-output-tree").path.read_text()
            .replace("name: generator-output-tree", "name: my-bench-generator"))
    (tmp_path / "mine.yaml").write_text(text)
    names = [d.name for d in find_drivers([tmp_path])]
    assert names[0] == "my-bench-generator" and "scope-block" in names
    other = tmp_path / "env"
    other.mkdir()
    (other / "x.yaml").write_text(text.replace("my-bench-generator", "env-generator"))
    monkeypatch.setenv("LOOPWRIGHT_DRIVERS", f"{other}{__import__('os').pathsep}")
    assert "env-generator" in [d.name for d in find_drivers()]


# ----------------------------------------------------------- python escape hatch
@driver_class("test-odd-generator")
class OddGenerator(TemplateGenerator):
    """A dialect that sends frequency in kHz with a unit suffix (templates cannot)."""

    def set_frequency(self, frequency_hz: float) -> None:
        hz = self.number("frequency_hz", frequency_hz)  # limits still checked
        self.send([f"FREQ {float(hz) / 1000:.9g}KHZ"], "set_frequency")


def _python_driver(tmp_path, python: str) -> str:
    path = tmp_path / "odd.yaml"
    path.write_text(textwrap.dedent(f"""\
        name: odd-generator
        role: generator
        dialect: odd
        match: {{idn: 'odd'}}
        error_query: 'SYST:ERR?'
        python: '{python}'
        values:
          frequency_hz: {{min: 1, max: 1.0e6}}
          amplitude_vpp: {{min: 0.01, max: 1}}
          offset_v: {{min: -1, max: 1}}
        """))
    return str(path)


def test_python_driver_registered_by_decorator(scpi_recorder, tmp_path):
    scpi_recorder.identity = "loopwright,odd,0,0"
    gen = open_instrument(scpi_recorder.resource, "generator",
                          driver=_python_driver(tmp_path, "test-odd-generator"),
                          timeout_s=2.0)
    assert type(gen) is OddGenerator
    mark = len(scpi_recorder.commands)
    gen.set_frequency(1500.0)
    assert scpi_recorder.sent_since(mark) == ["FREQ 1.5KHZ", "SYST:ERR?"]
    with pytest.raises(DriverError):
        gen.set_frequency(2e6)
    with pytest.raises(DriverError, match="no 'commands' templates"):
        gen.set_amplitude(0.5)
    gen.session.close()


def test_python_driver_module_class(scpi_recorder, tmp_path, monkeypatch):
    (tmp_path / "odd_module.py").write_text(
        "from loopwright.instruments import TemplateGenerator\n"
        "class Gen(TemplateGenerator):\n"
        "    def set_output(self, on):\n"
        "        self.send(['ENABLE' if on else 'DISABLE'], 'set_output')\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    scpi_recorder.identity = "loopwright,odd,0,0"
    gen = open_instrument(scpi_recorder.resource, "generator",
                          driver=_python_driver(tmp_path, "odd_module:Gen"), timeout_s=2.0)
    mark = len(scpi_recorder.commands)
    gen.set_output(True)
    assert scpi_recorder.sent_since(mark) == ["ENABLE", "SYST:ERR?"]
    gen.session.close()
    sys.modules.pop("odd_module", None)


def test_python_driver_that_is_not_a_class_is_our_error(scpi_recorder, tmp_path):
    """python: module:function (here os:getcwd) ends in DriverError, not a TypeError."""
    scpi_recorder.identity = "loopwright,odd,0,0"
    with pytest.raises(DriverError, match="'os:getcwd' is not a class"):
        open_instrument(scpi_recorder.resource, "generator",
                        driver=_python_driver(tmp_path, "os:getcwd"), timeout_s=2.0)


# ------------------------------------------------------------------- schema
def test_format_number_formats_and_limits():
    from loopwright.instruments.driver_schema import NumberSpec
    spec = NumberSpec(min=1, max=1e9, format=".10g")
    assert format_number("f", 1e6, spec, "d") == "1000000"
    assert format_number("f", 1.5e-5 * 1e6, spec, "d") == "15"
    assert format_number("f", np.float64(2.5), spec, "d") == "2.5"
    points = NumberSpec(min=100, max=1000, format="d", integer=True)
    assert format_number("points", np.int64(200), points, "d") == "200"
    with pytest.raises(DriverError):
        format_number("points", 200.5, points, "d")


BAD_TEMPLATES = [
    ("set_frequency: 'SOUR1:FREQ {frequency_hz!r}'", "format or conversion"),
    ("set_frequency: 'SOUR1:FREQ {frequency_hz:.3f}'", "format or conversion"),
    ("set_frequency: 'SOUR1:FREQ {frequency_hz.__class__}'", "plain name"),
    ("set_frequency: 'SOUR1:FREQ {amplitude_vpp}'", "not allowed here"),
    ("set_frequency: \"SOUR1:FREQ {frequency_hz}\\n*RST\"", "control characters"),
]


@pytest.mark.parametrize(("line", "message"), BAD_TEMPLATES)
def test_bad_templates_refused_with_line(tmp_path, line, message):
    source = (get_driver("generator-source-tree").path.read_text()
              .replace("set_frequency: 'SOUR1:FREQ {frequency_hz}'", line))
    assert line in source
    path = tmp_path / "bad.yaml"
    path.write_text(source)
    expected_line = source.splitlines().index("  " + line) + 1
    with pytest.raises(InputError, match=message) as info:
        load_driver(path)
    assert info.value.line == expected_line
    assert info.value.field == "commands.set_frequency"  # a single template, not a list


def test_number_placeholder_without_limits_refused_with_line(tmp_path):
    # {full_range_v} is sent as a number: the file must give it limits under values
    source = get_driver("scope-text").path.read_text()
    lines = source.splitlines(keepends=True)
    kept = [x for x in lines if not x.startswith("  full_range_v:")]
    assert len(kept) == len(lines) - 1
    text = "".join(kept)
    path = tmp_path / "no-range.yaml"
    path.write_text(text)
    expected_line = text.splitlines().index("    - ':INP{channel}:RANG {full_range_v}'") + 1
    with pytest.raises(InputError, match="give it limits") as info:
        load_driver(path)
    assert (info.value.line, info.value.field) == (expected_line, "commands.set_channel[1]")


def test_init_error_closes_session_and_raises(scpi_recorder):
    scpi_recorder.identity = _simulated("generator", "generator-source-tree")
    scpi_recorder.reject["SOUR1:VOLT:UNIT VPP"] = '-113,"Undefined header"'
    with pytest.raises(SCPIError, match="Undefined header"):
        open_instrument(scpi_recorder.resource, "generator", timeout_s=2.0)
