"""The simulated instruments' SCPI side, model level (no transport).

The command trees are checked against drivers/DIALECTS.md itself: every command and
query of every table is sent to the instrument of that dialect, with each fixed word
and both channels, and must leave the error queue empty; a reply the table gives
(``-> `SIN` ``) must come back. Error codes and event-register bits follow SCPI-99
chapter 21 and IEEE Std 488.2 (mem).
"""

from __future__ import annotations

import itertools
import math
import re

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from loopwright.resources import data_dir
from mock_instruments.bench import Impairments, SimulatedBench
from mock_instruments.instruments import DIALECTS, make_instrument, make_instruments
from mock_instruments.scope import BlockScope, TextScope
from mock_instruments.scpi import ErrorQueue


def new_bench(**impairments: object) -> SimulatedBench:
    return SimulatedBench("rational", Impairments(**impairments), seed=0)


def ask(instrument, command: str) -> str:
    return instrument.query(command)


def errors_of(instrument) -> list[int]:
    """Drain the error queue through the dialect's own error query."""
    codes = []
    query = instrument.error_query + "?"
    while True:
        code = int(ask(instrument, query).split(",", 1)[0])
        if code == 0:
            return codes
        codes.append(code)


# -- the dialect document ---------------------------------------------------------------

_PLACEHOLDERS = {
    "frequency_hz": "1234.5",
    "amplitude_vpp": "0.5",
    "offset_v": "0.1",
    "volts_per_div": "0.5",
    "ratio": "10",
    "points": "1000",
    "sample_rate_hz": "1e6",
    "level_v": "0",
    "full_range_v": "4",
}


def dialect_tables() -> dict[str, list[tuple[list[str], set[str]]]]:
    """dialect -> rows of (commands and queries in order, replies the row promises)."""
    text = (data_dir("drivers") / "DIALECTS.md").read_text()
    tables: dict[str, list[tuple[list[str], set[str]]]] = {}
    dialect = None
    for line in text.splitlines():
        heading = re.match(r"^## (\S+)", line)
        if heading:
            dialect = heading.group(1) if heading.group(1) in DIALECTS else None
            continue
        if dialect is None or not line.startswith("| ") or line.startswith("| operation"):
            continue
        before, _, after = line.partition("->")
        sent = re.findall(r"`([^`]*)`", before)
        promised = {r for r in re.findall(r"`([^`]*)`", after) if not re.search(r"[a-z,%]", r)}
        tables.setdefault(dialect, []).append((sent, promised))
    return tables


def expand(template: str) -> list[str]:
    """Every concrete command of a template: placeholders, both channels, each word."""
    text = template
    for name, value in _PLACEHOLDERS.items():
        text = text.replace("{" + name + "}", value)
    texts = [text.replace("{n}", "1"), text.replace("{n}", "2")] if "{n}" in text else [text]
    out = []
    for t in texts:
        words = t.split(" ")
        choices = [w.split("|") for w in words]
        out += [" ".join(c) for c in itertools.product(*choices)]
    return out


def test_the_dialect_document_lists_all_five_dialects() -> None:
    assert set(dialect_tables()) == set(DIALECTS)


@pytest.mark.parametrize("dialect", sorted(DIALECTS))
def test_every_command_of_the_dialect_document_is_understood(dialect: str) -> None:
    bench = new_bench()
    instrument = make_instrument(dialect, bench)
    rows = dialect_tables()[dialect]
    checked = 0
    for sent, promised in rows:
        if len(sent) == 1 and sent[0].endswith("?") and ":ERR" in sent[0].upper():
            # The errors row: the dialect's error query answers the empty queue.
            assert ask(instrument, sent[0]) == '0,"No error"'
            continue
        for template in sent:
            for command in expand(template):
                reply = instrument.handle(command)
                is_query = "?" in command
                assert (reply is not None) == is_query, command
                if is_query and promised and command == sent[-1]:
                    assert reply.decode().strip() in promised, command
                assert errors_of(instrument) == [], command
                checked += 1
    assert checked >= 3


@pytest.mark.parametrize(
    ("role", "dialect"),
    [(cls.role, name) for name, cls in sorted(DIALECTS.items())],
)
def test_identity_says_simulated_in_the_documented_format(role: str, dialect: str) -> None:
    instrument = make_instrument(dialect, new_bench(), serial="5025")
    from loopwright import __version__

    assert ask(instrument, "*IDN?") == (
        f"loopwright,simulated {role} ({dialect}),SIM-5025,{__version__}"
    )


# -- parser ---------------------------------------------------------------------------


def test_short_and_long_keywords_any_case_and_suffix_default() -> None:
    gen = make_instrument("generator-source-tree", new_bench())
    gen.handle("source1:frequency 2500")
    assert ask(gen, "SOUR:FREQ?") == "2500"
    gen.handle("SOURCE1:FREQ 3500.25")
    assert ask(gen, "sour1:freq?") == "3500.25"
    gen.handle("SOURc1:FREQ 1")  # neither the short nor the long form
    assert errors_of(gen) == [-113]


def test_semicolons_join_commands_and_queries_relative_to_the_previous_path() -> None:
    gen = make_instrument("generator-source-tree", new_bench())
    # SCPI-99 6.2.4 (mem): "VOLT 2" continues under SOUR1; ":OUTP1" restarts at the root.
    assert gen.handle("SOUR1:FREQ 5000;VOLT 2;:OUTP1 ON;:SOUR1:FREQ?;VOLT?;:OUTP1?") == (
        b"5000;2;1\n"
    )
    assert errors_of(gen) == []


def test_unknown_header_is_113_and_discards_the_rest_of_the_message() -> None:
    # IEEE 488.2 (mem): after a command error the rest of the message is not executed.
    gen = make_instrument("generator-source-tree", new_bench())
    assert gen.handle("SOUR1:FROB 1;SOUR1:FREQ 777") is None
    assert ask(gen, "SOUR1:FREQ?") == "1000"
    assert errors_of(gen) == [-113]


@pytest.mark.parametrize(
    ("command", "code"),
    [
        ("SOUR1:FREQ 3e7", -222),  # above 20 MHz
        ("SOUR1:FREQ 0.0001", -222),  # below 1 mHz
        ("SOUR1:VOLT 11", -222),
        ("SOUR1:FREQ abc", -104),
        ("SOUR1:FREQ 1,2", -108),
        ("SOUR1:FREQ", -109),
        ("SOUR2:FREQ 1000", -114),
        ("SOUR1:FUNC SQU", -224),
        ("SOUR1:FR@Q 1", -102),
        ('SOUR1:FREQ "1', -102),
        ("SOUR1:FREQ? 5", -108),
        ("*FOO", -113),
        ("*IDN", -113),  # the query only
    ],
)
def test_error_codes(command: str, code: int) -> None:
    gen = make_instrument("generator-source-tree", new_bench())
    gen.handle(command)
    assert errors_of(gen) == [code]
    assert ask(gen, "SOUR1:FREQ?") == "1000"  # the old value is kept


def test_out_of_range_keeps_the_old_value_and_the_text_names_the_limit() -> None:
    gen = make_instrument("generator-output-tree", new_bench())
    gen.handle("OUTP:CH1:FREQ 2e6")
    gen.handle("OUTP:CH1:FREQ 6e6")  # limit 5 MHz
    reply = ask(gen, "SYST:ERR:NEXT?")
    assert reply.startswith('-222,"Data out of range')
    assert "5e+06" in reply
    assert ask(gen, "OUTP:CH1:FREQ?") == "2000000"


def test_offset_plus_half_amplitude_is_limited() -> None:
    gen = make_instrument("generator-source-tree", new_bench())
    gen.handle("SOUR1:VOLT 6;:SOUR1:VOLT:OFFS 2")  # 2 + 3 = 5 V: allowed
    gen.handle("SOUR1:VOLT:OFFS 2.5")  # 5.5 V: refused
    gen.handle("SOUR1:VOLT 7")  # 2 + 3.5: refused
    assert errors_of(gen) == [-222, -222]
    assert ask(gen, "SOUR1:VOLT?;VOLT:OFFS?") == "6;2"


def test_generator_settings_reach_the_bench() -> None:
    bench = new_bench()
    gen = make_instrument("generator-output-tree", bench)
    gen.handle("OUTP:CH1:FREQ 4321;AMPL 1.5;DCOF -0.25;ENAB 1")
    assert (bench.generator.frequency_hz, bench.generator.amplitude_vpp) == (4321.0, 1.5)
    assert (bench.generator.offset_v, bench.generator.output_on) == (-0.25, True)
    gen.handle("*RST")
    assert bench.generator.output_on is False
    assert bench.generator.frequency_hz == 1000.0


def test_amplitude_unit_vrms_converts_for_a_sine() -> None:
    bench = new_bench()
    gen = make_instrument("generator-source-tree", bench)
    gen.handle("SOUR1:VOLT:UNIT VRMS;:SOUR1:VOLT 1")
    # A sine of 1 V rms is 2 sqrt(2) V peak-to-peak (textbook).
    assert bench.generator.amplitude_vpp == pytest.approx(2 * math.sqrt(2))
    assert float(ask(gen, "SOUR1:VOLT?")) == pytest.approx(1.0)


def test_error_queue_overflow_and_cls() -> None:
    # SCPI-99 (mem): a full queue replaces its newest entry with -350.
    gen = make_instrument("generator-source-tree", new_bench())
    for _ in range(15):
        gen.handle("NOPE")
    codes = errors_of(gen)
    assert len(codes) == ErrorQueue().capacity
    assert codes[-1] == -350 and set(codes[:-1]) == {-113}
    gen.handle("NOPE")
    gen.handle("*CLS")
    assert errors_of(gen) == []


def test_event_status_register_bits() -> None:
    # IEEE 488.2 (mem): bit 5 command error (32), bit 4 execution error (16), bit 0 OPC.
    gen = make_instrument("generator-source-tree", new_bench())
    gen.handle("NOPE")
    gen.handle("SOUR1:FREQ 1e9")
    assert ask(gen, "*ESR?") == "48"
    assert ask(gen, "*ESR?") == "0"  # reading clears it
    gen.handle("*OPC")
    assert ask(gen, "*ESR?") == "1"
    assert ask(gen, "*OPC?") == "1"


# -- scopes ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("cls", "command", "asked", "expected"),
    [
        (BlockScope, "TIM:SRAT", 1e9, 1e9),
        (BlockScope, "TIM:SRAT", 3e8, 2.5e8),  # 1 GS/s / 4, not / 3.33
        (BlockScope, "TIM:SRAT", 2e9, 1e9),
        (BlockScope, "TIM:SRAT", 1e6, 1e6),
        (BlockScope, "TIM:SRAT", 999_999.0, 1e9 / 1001),
        (TextScope, ":ACQ:RATE", 5e8, 5e8),
        (TextScope, ":ACQ:RATE", 2e8, 1.6666666666666666e8),  # 500 MS/s / 3
        (TextScope, ":ACQ:RATE", 1e5, 1e5),
    ],
)
def test_actual_sample_rate_is_clock_over_integer_at_or_below_the_asked(
    cls, command: str, asked: float, expected: float
) -> None:
    scope = cls(new_bench())
    scope.handle(f"{command} {asked!r}")
    actual = float(ask(scope, command + "?"))
    assert actual == pytest.approx(expected, rel=1e-15)
    assert actual <= asked
    assert (cls.clock_hz / actual) == pytest.approx(round(cls.clock_hz / actual), abs=1e-6)


@pytest.mark.parametrize(
    ("dialect", "command", "code"),
    [
        ("scope-block", "TIM:POIN 99", -222),
        ("scope-block", "TIM:POIN 4000001", -222),
        ("scope-block", "TIM:POIN 1000.5", -224),
        ("scope-block", "CHAN1:SCAL 20", -222),
        ("scope-block", "CHAN1:SCAL 0.0005", -222),
        ("scope-block", "CHAN3:SCAL 1", -114),
        ("scope-block", "CHAN1:COUP GND", -224),
        ("scope-block", "WAV:FORM ASCII", -224),
        ("scope-block", "TIM:SRAT 0", -222),
        ("scope-text", ":ACQ:LENG 200001", -222),
        ("scope-text", ":INP1:RANG 48", -222),  # 6 V/div > 5 V/div
        ("scope-text", ":INP1:RANG 0.008", -222),  # 1 mV/div < 2 mV/div
        ("scope-text", ":TRAC? INP3", -224),
    ],
)
def test_scope_limits(dialect: str, command: str, code: int) -> None:
    scope = make_instrument(dialect, new_bench())
    scope.handle(command)
    assert errors_of(scope) == [code]


def test_probe_attenuation_scales_the_scale_limits() -> None:
    bench = new_bench()
    scope = make_instrument("scope-block", bench)
    scope.handle("CHAN2:PROB 10;:CHAN2:SCAL 50")  # 10 V/div x 10
    assert errors_of(scope) == []
    assert bench.channels[2].scale_v_per_div == 50.0
    assert bench.channels[2].probe_attenuation == 10.0


def test_text_scope_range_is_eight_divisions() -> None:
    bench = new_bench()
    scope = make_instrument("scope-text", bench)
    scope.handle(":INP2:RANG 0.4;:INP2:OFFS -0.1;COUP AC")
    assert bench.channels[2].scale_v_per_div == pytest.approx(0.05)
    assert (bench.channels[2].offset_v, bench.channels[2].coupling) == (-0.1, "AC")
    assert float(ask(scope, ":INP2:RANG?")) == pytest.approx(0.4)


def test_one_acquisition_is_one_bench_call_for_both_channels() -> None:
    bench = new_bench()
    calls = []
    original = bench.acquire

    def counting(record_length, sample_rate_hz):
        calls.append((record_length, sample_rate_hz))
        return original(record_length, sample_rate_hz)

    bench.acquire = counting
    scope = make_instrument("scope-block", bench)
    scope.handle("TIM:POIN 500;SRAT 2e8;:ACQ:SING")
    assert ask(scope, "*OPC?") == "1"
    scope.handle("WAV:SOUR CHAN1")
    scope.handle("WAV:DATA?")
    scope.handle("WAV:SOUR CHAN2")
    scope.handle("WAV:DATA?")
    assert calls == [(500, 2e8)]


def test_block_codes_and_preamble_give_back_the_bench_volts() -> None:
    # volts = (code - y_reference) * y_increment + y_origin (DIALECTS.md, scope-block).
    bench = new_bench(adc_bits=12)
    gen = make_instrument("generator-source-tree", bench)
    scope = make_instrument("scope-block", bench)
    gen.handle("SOUR1:FREQ 1e5;VOLT 1;:OUTP1 ON")
    scope.handle("CHAN1:SCAL 0.2;OFFS 0.05;:TIM:POIN 2000;SRAT 1e8;:ACQ:SING")
    volts = scope.record.volts[1]
    points, x_inc, x0, y_inc, y0, y_ref = (float(v) for v in ask(scope, "WAV:PRE?").split(","))
    assert (points, x_inc, x0) == (2000, 1e-8, 0.0)
    for order, dtype in (("LSBF", "<i2"), ("MSBF", ">i2")):
        scope.handle(f"WAV:ORD {order}")
        block = scope.handle("WAV:DATA?")
        digits = int(block[1:2])
        length = int(block[2 : 2 + digits])
        assert length == 2 * 2000 and block.endswith(b"\n")
        codes = np.frombuffer(block[2 + digits : 2 + digits + length], dtype=dtype)
        decoded = (codes - y_ref) * y_inc + y0
        # Left-aligned 12-bit codes: multiples of 16.
        assert np.all(codes.astype(int) % 16 == 0)
        np.testing.assert_allclose(decoded, volts, atol=1e-12)


def test_clipped_samples_sit_on_the_end_codes() -> None:
    bench = new_bench(adc_bits=8)
    gen = make_instrument("generator-source-tree", bench)
    scope = make_instrument("scope-block", bench)
    gen.handle("SOUR1:FREQ 1e5;VOLT 2;:OUTP1 ON")
    scope.handle("CHAN1:SCAL 0.1;:TIM:POIN 2000;SRAT 1e8;:ACQ:SING")  # 1 V peak on +-0.4 V
    codes = scope.codes(scope.record, 1)
    assert codes.max() == 32767 and codes.min() == -32768


def test_text_scope_sends_seven_digit_exponent_volts() -> None:
    bench = new_bench()
    gen = make_instrument("generator-source-tree", bench)
    scope = make_instrument("scope-text", bench)
    gen.handle("SOUR1:FREQ 1e5;VOLT 1;:OUTP1 ON")
    scope.handle(":INP1:RANG 2;:ACQ:LENG 300;RATE 1e8;:ACQ:ARM")
    assert ask(scope, ":ACQ:DONE?") == "1"
    text = ask(scope, ":TRAC? INP1")
    fields = text.split(",")
    assert len(fields) == 300
    assert all(re.fullmatch(r"-?\d\.\d{7}e[+-]\d{2}", f) for f in fields)
    np.testing.assert_allclose(np.array(fields, float), scope.record.volts[1], rtol=6e-8)
    assert float(ask(scope, ":TRAC:XINC?")) == pytest.approx(1e-8)


def test_data_before_any_acquisition_is_230_with_an_empty_reply() -> None:
    block = make_instrument("scope-block", new_bench())
    assert block.handle("WAV:DATA?") == b"#10\n"
    assert errors_of(block) == [-230]
    text = make_instrument("scope-text", new_bench())
    assert text.handle(":TRAC? INP1") == b"\n"
    assert errors_of(text) == [-230]


def test_realtime_acquisition_takes_its_duration() -> None:
    bench = new_bench()
    scope = make_instrument("scope-block", bench, realtime=True)
    scope.handle("TIM:POIN 10000;SRAT 1e5")  # 0.1 s of record
    scope.handle("ACQ:SING")
    assert ask(scope, "ACQ:STAT?") == "BUSY"
    reply, ready_s = scope.execute("*OPC?")
    assert reply == b"1\n"
    assert 0.05 < ready_s <= bench.acquisition_duration_s(10000, 1e5)
    scope.handle("WAV:DATA?")
    assert errors_of(scope) == [-230]  # not complete yet


def test_relay_box_opens_and_closes_the_loop() -> None:
    bench = new_bench()
    relay = make_instrument("switch-relay", bench)
    relay.handle("ROUT:CLOS 1")
    assert bench.loop_closed is True
    assert ask(relay, "ROUT:STAT? 1") == "1"
    relay.handle("ROUT:OPEN (@1)")
    assert bench.loop_closed is False
    relay.handle("ROUT:CLOS 3")
    assert errors_of(relay) == [-222]
    relay.handle("ROUT:CLOS 1;*RST")
    assert bench.loop_closed is False


def test_make_instruments_checks_roles() -> None:
    with pytest.raises(ValueError, match="is a scope"):
        make_instruments(new_bench(), {"generator": "scope-text"})
    with pytest.raises(ValueError, match="unknown dialect"):
        make_instrument("scope-fancy", new_bench())


# -- robustness ---------------------------------------------------------------------------

_WORDS = [
    "SOUR1",
    "FREQ",
    "VOLT",
    "OUTP",
    "CH1",
    "CHAN2",
    "INP1",
    "TIM",
    "ACQ",
    "WAV",
    "ROUT",
    "SYST",
    "ERR",
    "*IDN",
    "*RST",
    "*OPC",
    "1e3",
    "-5",
    "ON",
    "(@1)",
    "INT16",
]


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    dialect=st.sampled_from(sorted(DIALECTS)),
    line=st.one_of(
        st.text(alphabet=st.characters(blacklist_characters="\n"), max_size=60),
        st.lists(st.sampled_from([*_WORDS, ":", "?", ";", " ", ",", '"']), max_size=12).map(
            "".join
        ),
    ),
)
def test_any_line_gives_a_reply_or_an_error_never_an_exception(dialect: str, line: str) -> None:
    instrument = make_instrument(dialect, new_bench())
    reply = instrument.handle(line)
    assert reply is None or reply.endswith(b"\n")
    for code in errors_of(instrument):
        assert code < 0
