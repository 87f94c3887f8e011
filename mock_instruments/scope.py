"""Simulated two-channel scopes: ``scope-block`` and ``scope-text``.

The vertical settings of each channel live in ``bench.channels`` (the bench quantises
and clips to each channel's screen); the scope keeps the timebase, the trigger and the
last record. One acquisition makes ONE ``bench.acquire`` call for both channels, so
they share one trigger. The actual sample rate is the scope's clock divided by an
integer, the nearest rate at or below the one asked. With ``realtime=True`` an
acquisition is complete only after its real duration
(``bench.acquisition_duration_s``); otherwise as soon as it is computed.

``scope-block`` sends int16 codes in an IEEE 488.2 definite-length block
(IEEE Std 488.2 (mem) 8.7.9: ``#<digits><length><bytes>``) and a preamble with
volts = (code - y_reference) * y_increment + y_origin. The ADC spans the screen,
offset +- 4 divisions, over the full int16 range: y_increment = 8 div * scale / 65536,
y_origin = offset, y_reference = 0; an 8- or 12-bit ADC gives left-aligned codes.
``scope-text`` sends volts as ``%.7e`` separated by commas on one line.

The trigger settings are kept and read back, but the bench always triggers on the
stimulus' rising zero crossing (``bench.acquire``). Before the first acquisition the
scope is idle: ``ACQ:STAT?`` answers ``DONE`` and ``:ACQ:DONE?`` ``1``; asking for data
then (or while an acquisition runs) gives -230 and an empty reply (``#10`` or an
empty line), which keeps the client in step.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from mock_instruments.scpi import (
    CommandError,
    CommandTree,
    SimulatedInstrument,
    check_range,
    expect_args,
    format_number,
    parse_choice,
    parse_integer,
    parse_number,
    parse_suffixed_word,
)

SCREEN_DIVISIONS = 8
CHANNELS = (1, 2)
#: Largest clock divider: the slowest rate is clock / this.
MAX_DIVIDER = 10**9


@dataclass(frozen=True)
class Record:
    """One acquisition of both channels and the settings it was taken with."""

    volts: dict[int, np.ndarray]
    sample_rate_hz: float
    scale_v_per_div: dict[int, float]
    offset_v: dict[int, float]


class SimulatedScope(SimulatedInstrument):
    """Timebase, trigger, channel limits and acquisition shared by the scope dialects."""

    role = "scope"
    clock_hz: ClassVar[float]
    min_points: ClassVar[int]
    max_points: ClassVar[int]
    #: Volts per division at the probe tip for probe attenuation 1 (scaled by it).
    min_scale_v_per_div: ClassVar[float]
    max_scale_v_per_div: ClassVar[float]
    #: Largest |offset| at the probe tip for probe attenuation 1 (scaled by it).
    max_offset_v: ClassVar[float] = 50.0
    default_points: ClassVar[int] = 10_000
    #: The header word naming a channel in this dialect's arguments (``CHANnel``, ``INPut``).
    channel_word: ClassVar[str]

    def reset_state(self) -> None:
        for n in CHANNELS:
            self._set_channel(
                n, scale_v_per_div=1.0, offset_v=0.0, coupling="DC", probe_attenuation=1.0
            )
        self.record_length = self.default_points
        self.divider = 1000
        self.trigger_channel = 1
        self.trigger_level_v = 0.0
        self.trigger_slope = "RISE"
        self.record: Record | None = None
        self.done_at = -math.inf

    # -- settings --------------------------------------------------------------------

    @property
    def sample_rate_hz(self) -> float:
        """The actual sample rate: clock / divider."""
        return self.clock_hz / self.divider

    def _set_channel(self, n: int, **changes: Any) -> None:
        channels = self.bench.channels
        channels[n] = dataclasses.replace(channels[n], **changes)

    def channel_number(self, suffixes: tuple[int, ...]) -> int:
        """The channel of a header suffix, else -114."""
        n = suffixes[0]
        if n not in CHANNELS:
            raise CommandError(-114, f"no channel {n}; channels are 1 and 2")
        return n

    def set_scale(self, n: int, scale_v_per_div: float) -> None:
        """Volts per division at the probe tip, within the limits times the attenuation."""
        attenuation = self.bench.channels[n].probe_attenuation
        check_range(
            scale_v_per_div,
            self.min_scale_v_per_div * attenuation,
            self.max_scale_v_per_div * attenuation,
            "scale",
            "V/div",
        )
        self._set_channel(n, scale_v_per_div=scale_v_per_div)

    def set_offset(self, n: int, offset_v: float) -> None:
        """Volts at the centre of the screen."""
        limit = self.max_offset_v * self.bench.channels[n].probe_attenuation
        check_range(offset_v, -limit, limit, "offset", "V")
        self._set_channel(n, offset_v=offset_v)

    def set_coupling(self, n: int, word: str) -> None:
        """AC or DC."""
        self._set_channel(n, coupling=parse_choice(word, {"AC": "AC", "DC": "DC"}))

    def set_attenuation(self, n: int, ratio: float) -> None:
        """Probe attenuation; the scale keeps its value, clamped into the new limits."""
        check_range(ratio, 0.001, 10000.0, "probe attenuation", "")
        scale = self.bench.channels[n].scale_v_per_div
        scale = min(max(scale, self.min_scale_v_per_div * ratio), self.max_scale_v_per_div * ratio)
        self._set_channel(n, probe_attenuation=ratio, scale_v_per_div=scale)

    def set_record_length(self, points: int) -> None:
        """Samples per channel."""
        check_range(points, self.min_points, self.max_points, "record length", "points")
        self.record_length = points

    def set_sample_rate(self, asked_hz: float) -> None:
        """Pick the nearest rate at or below ``asked_hz`` (clock / integer)."""
        check_range(asked_hz, self.clock_hz / MAX_DIVIDER, math.inf, "sample rate", "Sa/s")
        # The tiny relative slack keeps an exactly reachable rate from rounding up.
        self.divider = max(1, math.ceil(self.clock_hz / asked_hz * (1 - 1e-12)))

    # -- acquisition -------------------------------------------------------------------

    def start_acquisition(self) -> None:
        """One acquisition of both channels on one trigger (one bench.acquire call)."""
        self.record = None
        if self.faults.acquisition_never_completes:
            self.done_at = math.inf
            return
        rate_hz = self.sample_rate_hz
        started = self.clock()
        volts = self.bench.acquire(self.record_length, rate_hz)
        channels = self.bench.channels
        self.record = Record(
            volts={n: np.asarray(volts[n], dtype=float) for n in CHANNELS},
            sample_rate_hz=rate_hz,
            scale_v_per_div={n: channels[n].scale_v_per_div for n in CHANNELS},
            offset_v={n: channels[n].offset_v for n in CHANNELS},
        )
        duration_s = (
            self.bench.acquisition_duration_s(self.record_length, rate_hz) if self.realtime else 0.0
        )
        self.done_at = started + duration_s

    def operations_done_at(self) -> float:
        return self.done_at

    @property
    def acquisition_done(self) -> bool:
        """True when no acquisition is running."""
        return self.clock() >= self.done_at

    def finished_record(self) -> Record:
        """The last complete record, else -230."""
        if self.record is None or not self.acquisition_done:
            raise CommandError(-230, "no complete acquisition")
        return self.record

    def record_or_error(self) -> Record | None:
        """The last complete record; else None with -230 queued (the empty-reply path)."""
        try:
            return self.finished_record()
        except CommandError as failure:
            self.errors.push(failure.code, failure.detail)
            return None

    def shown_interval_s(self) -> float:
        """Sample interval of the last complete record, else of the present settings."""
        if self.record is not None and self.acquisition_done:
            return 1.0 / self.record.sample_rate_hz
        return 1.0 / self.sample_rate_hz

    def adc_bits(self) -> int:
        """The bench's ADC resolution in bits, 0 for an ideal converter."""
        return int(getattr(getattr(self.bench, "impairments", None), "adc_bits", 0) or 0)

    # -- handlers both dialects register (under their own headers) ----------------------

    def parse_channel_word(self, word: str) -> int:
        """A channel named as ``<channel_word><n>`` (``CHAN2``, ``INP1``)."""
        return parse_suffixed_word(word, self.channel_word, 2)

    def channel_reply(self, n: int) -> str:
        """The short form of channel ``n``'s name (``CHAN1``, ``INP1``)."""
        short = "".join(c for c in self.channel_word if c.isupper())
        return f"{short}{n}"

    def _set_offset(self, s: tuple[int, ...], a: list[str]) -> None:
        self.set_offset(self.channel_number(s), parse_number(expect_args(a, 1)[0]))

    def _get_offset(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return format_number(self.bench.channels[self.channel_number(s)].offset_v)

    def _set_coupling(self, s: tuple[int, ...], a: list[str]) -> None:
        self.set_coupling(self.channel_number(s), expect_args(a, 1)[0])

    def _get_coupling(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return self.bench.channels[self.channel_number(s)].coupling

    def _set_probe(self, s: tuple[int, ...], a: list[str]) -> None:
        self.set_attenuation(self.channel_number(s), parse_number(expect_args(a, 1)[0]))

    def _get_probe(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return format_number(self.bench.channels[self.channel_number(s)].probe_attenuation)

    def _set_points(self, s: tuple[int, ...], a: list[str]) -> None:
        self.set_record_length(parse_integer(expect_args(a, 1)[0]))

    def _get_points(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return str(self.record_length)

    def _set_rate(self, s: tuple[int, ...], a: list[str]) -> None:
        self.set_sample_rate(parse_number(expect_args(a, 1)[0]))

    def _get_rate(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return format_number(self.sample_rate_hz)

    def _start(self, s: tuple[int, ...], a: list[str]) -> None:
        expect_args(a, 0)
        self.start_acquisition()

    def _set_trig_source(self, s: tuple[int, ...], a: list[str]) -> None:
        self.trigger_channel = self.parse_channel_word(expect_args(a, 1)[0])

    def _get_trig_source(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return self.channel_reply(self.trigger_channel)

    def _set_trig_level(self, s: tuple[int, ...], a: list[str]) -> None:
        self.trigger_level_v = parse_number(expect_args(a, 1)[0])

    def _get_trig_level(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return format_number(self.trigger_level_v)

    def _set_trig_slope(self, s: tuple[int, ...], a: list[str]) -> None:
        self.trigger_slope = parse_choice(expect_args(a, 1)[0], {"RISE": "RISE", "FALL": "FALL"})

    def _get_trig_slope(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return self.trigger_slope


class BlockScope(SimulatedScope):
    """``scope-block``: ``CHAN{n}:SCAL``, ``TIM:SRAT``, ``ACQ:SING``, ``WAV:DATA?``..."""

    dialect = "scope-block"
    error_query = "SYSTem:ERRor"
    clock_hz = 1e9
    min_points = 100
    max_points = 4_000_000
    min_scale_v_per_div = 1e-3
    max_scale_v_per_div = 10.0
    channel_word = "CHANnel"

    def reset_state(self) -> None:
        super().reset_state()
        self.waveform_channel = 1
        self.big_endian = False

    def define(self, tree: CommandTree) -> None:
        chan = "CHANnel#"
        tree.add(f"{chan}:SCALe", command=self._set_scale, query=self._get_scale)
        tree.add(f"{chan}:OFFSet", command=self._set_offset, query=self._get_offset)
        tree.add(f"{chan}:COUPling", command=self._set_coupling, query=self._get_coupling)
        tree.add(f"{chan}:PROBe", command=self._set_probe, query=self._get_probe)
        tree.add("TIMebase:POINts", command=self._set_points, query=self._get_points)
        tree.add("TIMebase:SRATe", command=self._set_rate, query=self._get_rate)
        tree.add("TRIGger:SOURce", command=self._set_trig_source, query=self._get_trig_source)
        tree.add("TRIGger:LEVel", command=self._set_trig_level, query=self._get_trig_level)
        tree.add("TRIGger:SLOPe", command=self._set_trig_slope, query=self._get_trig_slope)
        tree.add("ACQuire:SINGle", command=self._start)
        tree.add("ACQuire:STATe", query=self._get_state)
        tree.add("WAVeform:SOURce", command=self._set_wav_source, query=self._get_wav_source)
        tree.add("WAVeform:FORMat", command=self._set_format, query=self._get_format)
        tree.add("WAVeform:ORDer", command=self._set_order, query=self._get_order)
        tree.add("WAVeform:PREamble", query=self._get_preamble)
        tree.add("WAVeform:DATA", query=self._get_data)

    def _set_scale(self, s: tuple[int, ...], a: list[str]) -> None:
        self.set_scale(self.channel_number(s), parse_number(expect_args(a, 1)[0]))

    def _get_scale(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return format_number(self.bench.channels[self.channel_number(s)].scale_v_per_div)

    def _get_state(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return "DONE" if self.acquisition_done else "BUSY"

    def _set_wav_source(self, s: tuple[int, ...], a: list[str]) -> None:
        self.waveform_channel = self.parse_channel_word(expect_args(a, 1)[0])

    def _get_wav_source(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return self.channel_reply(self.waveform_channel)

    def _set_format(self, s: tuple[int, ...], a: list[str]) -> None:
        parse_choice(expect_args(a, 1)[0], {"INT16": "INT16"})

    def _get_format(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return "INT16"

    def _set_order(self, s: tuple[int, ...], a: list[str]) -> None:
        order = parse_choice(expect_args(a, 1)[0], {"LSBF": "LSBF", "MSBF": "MSBF"})
        self.big_endian = order == "MSBF"

    def _get_order(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return "MSBF" if self.big_endian else "LSBF"

    def y_increment_v(self, scale_v_per_div: float) -> float:
        """Volts per int16 code: the screen over 65536 codes."""
        return SCREEN_DIVISIONS * scale_v_per_div / 65536.0

    def _get_preamble(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        n = self.waveform_channel
        if self.record is not None and self.acquisition_done:
            points = len(self.record.volts[n])
            scale, offset = self.record.scale_v_per_div[n], self.record.offset_v[n]
        else:
            points = self.record_length
            scale, offset = self.bench.channels[n].scale_v_per_div, self.bench.channels[n].offset_v
        fields = (points, self.shown_interval_s(), 0.0, self.y_increment_v(scale), offset, 0)
        return ",".join(format_number(f) for f in fields)

    def codes(self, record: Record, n: int) -> np.ndarray:
        """The int16 codes of channel ``n`` of ``record``."""
        y_inc = self.y_increment_v(record.scale_v_per_div[n])
        codes = np.clip(np.rint((record.volts[n] - record.offset_v[n]) / y_inc), -32768, 32767)
        # The bench's top ADC level (screen top less one step) is where it clips: send
        # it as 32767, the code DIALECTS.md gives for clipping at the top.
        bits = self.adc_bits()
        if 0 < bits < 16:
            codes = np.where(codes >= 32768 - 2 ** (16 - bits), 32767, codes)
        return codes.astype(np.int16)

    def _get_data(self, s: tuple[int, ...], a: list[str]) -> bytes:
        expect_args(a, 0)
        record = self.record_or_error()
        if record is None:
            return b"#10"
        dtype = ">i2" if self.big_endian else "<i2"
        return ieee_block(self.codes(record, self.waveform_channel).astype(dtype).tobytes())


class TextScope(SimulatedScope):
    """``scope-text``: ``:INP{n}:RANG``, ``:ACQ:RATE``, ``:ACQ:ARM``, ``:TRAC? INP{n}``..."""

    dialect = "scope-text"
    error_query = "SYSTem:ERRor"
    clock_hz = 500e6
    min_points = 100
    max_points = 200_000
    min_scale_v_per_div = 2e-3
    max_scale_v_per_div = 5.0
    channel_word = "INPut"

    def define(self, tree: CommandTree) -> None:
        inp = "INPut#"
        tree.add(f"{inp}:RANGe", command=self._set_range, query=self._get_range)
        tree.add(f"{inp}:OFFSet", command=self._set_offset, query=self._get_offset)
        tree.add(f"{inp}:COUPling", command=self._set_coupling, query=self._get_coupling)
        tree.add(f"{inp}:ATTenuation", command=self._set_probe, query=self._get_probe)
        tree.add("ACQuire:LENGth", command=self._set_points, query=self._get_points)
        tree.add("ACQuire:RATE", command=self._set_rate, query=self._get_rate)
        tree.add("ACQuire:ARM", command=self._start)
        tree.add("ACQuire:DONE", query=self._get_done)
        tree.add("TRIGger:SRC", command=self._set_trig_source, query=self._get_trig_source)
        tree.add("TRIGger:THReshold", command=self._set_trig_level, query=self._get_trig_level)
        tree.add("TRIGger:EDGE", command=self._set_trig_slope, query=self._get_trig_slope)
        tree.add("TRACe", query=self._get_trace)
        tree.add("TRACe:XINCrement", query=self._get_xinc)

    def _set_range(self, s: tuple[int, ...], a: list[str]) -> None:
        full_range_v = parse_number(expect_args(a, 1)[0])
        self.set_scale(self.channel_number(s), full_range_v / SCREEN_DIVISIONS)

    def _get_range(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        scale = self.bench.channels[self.channel_number(s)].scale_v_per_div
        return format_number(scale * SCREEN_DIVISIONS)

    def _get_done(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return "1" if self.acquisition_done else "0"

    def _get_trace(self, s: tuple[int, ...], a: list[str]) -> str:
        n = self.parse_channel_word(expect_args(a, 1)[0])
        record = self.record_or_error()
        if record is None:
            return ""
        volts = record.volts[n]
        bits = self.adc_bits()
        if bits > 0:
            # The bench's top ADC level is where it clips: report it as the screen top.
            scale, offset = record.scale_v_per_div[n], record.offset_v[n]
            top_v = offset + scale * SCREEN_DIVISIONS / 2
            step_v = scale * SCREEN_DIVISIONS / 2**bits
            volts = np.where(volts >= top_v - step_v * 1.000001, top_v, volts)
        return ",".join(np.char.mod("%.7e", volts).tolist())

    def _get_xinc(self, s: tuple[int, ...], a: list[str]) -> str:
        expect_args(a, 0)
        return format_number(self.shown_interval_s())


def ieee_block(data: bytes) -> bytes:
    """An IEEE 488.2 definite-length arbitrary block: ``#<n><length><data>``."""
    length = str(len(data))
    if len(length) > 9:
        raise ValueError("block longer than 999,999,999 bytes")
    return b"#" + str(len(length)).encode() + length.encode() + data
