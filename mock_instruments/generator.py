"""Simulated sine generators: ``generator-source-tree`` and ``generator-output-tree``.

Both drive the same :class:`~mock_instruments.bench.SimulatedBench` through
``bench.apply_generator`` (which starts the DUT's settling transient) and read their
settings back from ``bench.generator``, so the bench state is the single truth.
Out-of-range values are refused with -222 and the old value is kept; the fault hook
``faults.refuse_amplitude_above`` adds a lower amplitude ceiling.
"""

from __future__ import annotations

import math
from typing import ClassVar

from mock_instruments.scpi import (
    CommandError,
    CommandTree,
    SimulatedInstrument,
    check_range,
    expect_args,
    format_number,
    parse_bool,
    parse_choice,
    parse_number,
)

#: Power-on settings of every simulated generator.
DEFAULTS = {
    "frequency_hz": 1000.0,
    "amplitude_vpp": 0.1,
    "offset_v": 0.0,
    "output_on": False,
    "shape": "sine",
}

_VRMS_PER_VPP = 1.0 / (2.0 * math.sqrt(2.0))  # sine: Vrms = Vpp / (2 sqrt 2)


class SimulatedGenerator(SimulatedInstrument):
    """Limits and setters shared by the generator dialects."""

    role = "generator"
    min_frequency_hz: ClassVar[float]
    max_frequency_hz: ClassVar[float]
    min_amplitude_vpp: ClassVar[float]
    max_amplitude_vpp: ClassVar[float]
    #: |offset| + amplitude / 2 may not exceed this.
    max_peak_v: ClassVar[float]
    #: The one waveform: the word the dialect accepts and the word it answers.
    sine_word: ClassVar[str]
    sine_reply: ClassVar[str]

    def reset_state(self) -> None:
        self.bench.apply_generator(**DEFAULTS)

    # Setters used by the dialect handlers.

    def set_frequency(self, frequency_hz: float) -> None:
        check_range(frequency_hz, self.min_frequency_hz, self.max_frequency_hz, "frequency", "Hz")
        self.bench.apply_generator(frequency_hz=frequency_hz)

    def set_amplitude(self, amplitude_vpp: float) -> None:
        check_range(
            amplitude_vpp, self.min_amplitude_vpp, self.max_amplitude_vpp, "amplitude", "Vpp"
        )
        ceiling = self.faults.amplitude_limit_vpp
        if ceiling is not None and amplitude_vpp > ceiling:
            raise CommandError(
                -222, f"amplitude {format_number(amplitude_vpp)} Vpp refused above {ceiling:g}"
            )
        self._check_peak(amplitude_vpp, self.bench.generator.offset_v)
        self.bench.apply_generator(amplitude_vpp=amplitude_vpp)

    def set_offset(self, offset_v: float) -> None:
        self._check_peak(self.bench.generator.amplitude_vpp, offset_v)
        self.bench.apply_generator(offset_v=offset_v)

    def set_output(self, on: bool) -> None:
        self.bench.apply_generator(output_on=on)

    def _check_peak(self, amplitude_vpp: float, offset_v: float) -> None:
        peak_v = abs(offset_v) + amplitude_vpp / 2.0
        if peak_v > self.max_peak_v * (1 + 1e-12):
            raise CommandError(
                -222,
                f"|offset| + amplitude/2 = {peak_v:g} V above {self.max_peak_v:g} V",
            )

    def _channel(self, suffixes: tuple[int, ...]) -> None:
        if any(s != 1 for s in suffixes):
            raise CommandError(-114, "this generator has one output, 1")

    # Handlers both dialects register (under their own headers).

    def _set_shape(self, suffixes: tuple[int, ...], args: list[str]) -> None:
        self._channel(suffixes)
        parse_choice(expect_args(args, 1)[0], {self.sine_word: self.sine_reply})

    def _get_shape(self, suffixes: tuple[int, ...], args: list[str]) -> str:
        self._channel(suffixes)
        expect_args(args, 0)
        return self.sine_reply

    def _set_frequency(self, suffixes: tuple[int, ...], args: list[str]) -> None:
        self._channel(suffixes)
        self.set_frequency(parse_number(expect_args(args, 1)[0]))

    def _get_frequency(self, suffixes: tuple[int, ...], args: list[str]) -> str:
        self._channel(suffixes)
        expect_args(args, 0)
        return format_number(self.bench.generator.frequency_hz)

    def _set_amplitude(self, suffixes: tuple[int, ...], args: list[str]) -> None:
        self._channel(suffixes)
        self.set_amplitude(parse_number(expect_args(args, 1)[0]))

    def _get_amplitude(self, suffixes: tuple[int, ...], args: list[str]) -> str:
        self._channel(suffixes)
        expect_args(args, 0)
        return format_number(self.bench.generator.amplitude_vpp)

    def _set_offset(self, suffixes: tuple[int, ...], args: list[str]) -> None:
        self._channel(suffixes)
        self.set_offset(parse_number(expect_args(args, 1)[0]))

    def _get_offset(self, suffixes: tuple[int, ...], args: list[str]) -> str:
        self._channel(suffixes)
        expect_args(args, 0)
        return format_number(self.bench.generator.offset_v)

    def _set_output(self, suffixes: tuple[int, ...], args: list[str]) -> None:
        self._channel(suffixes)
        self.set_output(parse_bool(expect_args(args, 1)[0]))

    def _get_output(self, suffixes: tuple[int, ...], args: list[str]) -> str:
        self._channel(suffixes)
        expect_args(args, 0)
        return "1" if self.bench.generator.output_on else "0"


class SourceTreeGenerator(SimulatedGenerator):
    """``generator-source-tree``: ``SOUR1:FREQ``, ``SOUR1:VOLT``, ``OUTP1 ON``..."""

    dialect = "generator-source-tree"
    error_query = "SYSTem:ERRor"
    min_frequency_hz = 1e-3
    max_frequency_hz = 20e6
    min_amplitude_vpp = 1e-3
    max_amplitude_vpp = 10.0
    max_peak_v = 5.0
    sine_word = "SINusoid"
    sine_reply = "SIN"

    def reset_state(self) -> None:
        super().reset_state()
        self.amplitude_unit = "VPP"

    def define(self, tree: CommandTree) -> None:
        tree.add("SOURce#:FUNCtion", command=self._set_shape, query=self._get_shape)
        tree.add("SOURce#:FREQuency", command=self._set_frequency, query=self._get_frequency)
        tree.add("SOURce#:VOLTage", command=self._set_voltage, query=self._get_voltage)
        tree.add("SOURce#:VOLTage:UNIT", command=self._set_unit, query=self._get_unit)
        tree.add("SOURce#:VOLTage:OFFSet", command=self._set_offset, query=self._get_offset)
        tree.add("OUTPut#", command=self._set_output, query=self._get_output)
        tree.add("OUTPut#:STATe", command=self._set_output, query=self._get_output)

    def _set_voltage(self, suffixes: tuple[int, ...], args: list[str]) -> None:
        self._channel(suffixes)
        value = parse_number(expect_args(args, 1)[0])
        self.set_amplitude(value / _VRMS_PER_VPP if self.amplitude_unit == "VRMS" else value)

    def _get_voltage(self, suffixes: tuple[int, ...], args: list[str]) -> str:
        self._channel(suffixes)
        expect_args(args, 0)
        vpp = self.bench.generator.amplitude_vpp
        return format_number(vpp * _VRMS_PER_VPP if self.amplitude_unit == "VRMS" else vpp)

    def _set_unit(self, suffixes: tuple[int, ...], args: list[str]) -> None:
        self._channel(suffixes)
        self.amplitude_unit = parse_choice(expect_args(args, 1)[0], {"VPP": "VPP", "VRMS": "VRMS"})

    def _get_unit(self, suffixes: tuple[int, ...], args: list[str]) -> str:
        self._channel(suffixes)
        expect_args(args, 0)
        return self.amplitude_unit


class OutputTreeGenerator(SimulatedGenerator):
    """``generator-output-tree``: ``OUTP:CH1:FREQ``, ``OUTP:CH1:AMPL``, ``OUTP:CH1:ENAB``..."""

    dialect = "generator-output-tree"
    error_query = "SYSTem:ERRor:NEXT"
    min_frequency_hz = 10e-3
    max_frequency_hz = 5e6
    min_amplitude_vpp = 2e-3
    max_amplitude_vpp = 20.0
    max_peak_v = 10.0
    sine_word = "SINE"
    sine_reply = "SINE"

    def define(self, tree: CommandTree) -> None:
        out = "OUTPut:CHannel#"
        tree.add(f"{out}:SHAPe", command=self._set_shape, query=self._get_shape)
        tree.add(f"{out}:FREQuency", command=self._set_frequency, query=self._get_frequency)
        tree.add(f"{out}:AMPLitude", command=self._set_amplitude, query=self._get_amplitude)
        tree.add(f"{out}:DCOFfset", command=self._set_offset, query=self._get_offset)
        tree.add(f"{out}:ENABle", command=self._set_output, query=self._get_output)
