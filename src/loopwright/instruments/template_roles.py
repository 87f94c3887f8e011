"""Role objects driven by a driver file's templates: generator, scope, loop/probe switch.

Every operation first checks and formats all its values (limits, integer-ness,
channel numbers, fixed word sets, bench caps) and only then writes, so a refused
value never leaves a half-applied setting. After each configuration operation the
driver's error query is read and a queued error is raised as :class:`SCPIError`.
"""

from __future__ import annotations

import math
import re
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from numbers import Real
from typing import Any

import numpy as np

from loopwright.errors import DriverError, InstrumentError, InstrumentTimeout, SafetyError
from loopwright.instruments.driver_schema import (
    GeneratorDriver,
    NumberSpec,
    ScopeDriver,
    SwitchDriver,
    template_fields,
)
from loopwright.instruments.roles import (
    SCREEN_DIVISIONS,
    Capture,
    ChannelSettings,
    GeneratorSettings,
)
from loopwright.instruments.session import Session

_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_DEFAULT_SPEC = NumberSpec()


@dataclass(frozen=True)
class GeneratorCaps:
    """Caps from the bench file, enforced in the driver layer (SafetyError, nothing sent).

    Attributes
    ----------
    max_amplitude_vpp
        Highest amplitude the bench allows (protects the DUT).
    max_frequency_hz
        Highest frequency the bench allows.
    max_peak_v
        Highest ``|offset_v| + amplitude_vpp / 2``.
    """

    max_amplitude_vpp: float | None = None
    max_frequency_hz: float | None = None
    max_peak_v: float | None = None


def format_number(name: str, value: Any, spec: NumberSpec, driver: str,
                  limit_factor: float = 1.0) -> str:
    """Check ``value`` against ``spec`` and format it for the instrument.

    ``limit_factor`` multiplies ``spec.min`` and ``spec.max`` (the probe ratio for
    values with ``times_probe_ratio``).

    Raises
    ------
    DriverError
        Not a finite real number, not an integer where one is needed, or outside the
        driver's limits.
    """
    if isinstance(value, bool) or not isinstance(value, Real):
        raise DriverError(f"{name} must be a number, got {value!r}; nothing was sent")
    number = float(value)
    if not math.isfinite(number):
        raise DriverError(f"{name} must be finite, got {value!r}; nothing was sent")
    if spec.integer and number != int(number):
        raise DriverError(f"{name} must be a whole number, got {value!r}; nothing was sent")
    low = None if spec.min is None else spec.min * limit_factor
    high = None if spec.max is None else spec.max * limit_factor
    if low is not None and number < low:
        raise DriverError(f"{name} = {number:g} is below the limit {low:g} of driver"
                          f" {driver!r}; nothing was sent")
    if high is not None and number > high:
        raise DriverError(f"{name} = {number:g} is above the limit {high:g} of driver"
                          f" {driver!r}; nothing was sent")
    text = format(int(number), "d") if spec.format == "d" else format(number, spec.format)
    if not _NUMBER.match(text):  # a format spec can never yield anything else; be sure
        raise DriverError(f"{name} formatted as {text!r}, not a plain number")
    return text


def render(template: str, fields: Mapping[str, str]) -> str:
    """Substitute already checked and formatted ``fields`` into ``template``."""
    names = template_fields(template)
    return template.format_map({n: fields[n] for n in names})


class TemplateInstrument:
    """What every template role shares: the session, value checks, sending, teardown.

    Parameters
    ----------
    session
        An open :class:`Session` (identity already read).
    spec
        The validated driver.
    caps
        Bench caps (used by generators).

    Attributes
    ----------
    identity, driver_name, session
        The ``*IDN?`` answer, the driver's name, the session.
    """

    def __init__(self, session: Session, spec: Any, caps: GeneratorCaps | None = None) -> None:
        self.session = session
        self.spec = spec
        self.caps = caps or GeneratorCaps()
        self.identity = session.identity
        self.driver_name = spec.name
        self.driver_path: Any = None
        if session.error_query is None:
            session.error_query = spec.error_query
        if spec.init:
            self.send(list(spec.init), "init")

    # values
    def number(self, name: str, value: Any, probe_ratio: float = 1.0) -> str:
        """``value`` checked and formatted by the driver's ``values: name:`` entry.

        ``probe_ratio`` scales the limits of entries marked ``times_probe_ratio``.
        """
        spec = self.spec.values.get(name, _DEFAULT_SPEC)
        factor = probe_ratio if spec.times_probe_ratio else 1.0
        return format_number(name, value, spec, self.spec.name, factor)

    def word(self, set_name: str, value: Any) -> str:
        """The instrument word for role value ``value`` of word set ``set_name``.

        Raises
        ------
        DriverError
            ``value`` is not one of the set's role values.
        """
        words: Mapping[str, str] = getattr(self.spec.words, set_name)
        if not isinstance(value, str) or value not in words:
            raise DriverError(f"{set_name} must be one of {', '.join(words)}, got {value!r};"
                              " nothing was sent")
        return words[value]

    def limit(self, name: str, bound: str) -> float:
        """A driver limit (``min``/``max``) of value ``name``, inf if none."""
        spec = self.spec.values.get(name)
        value = getattr(spec, bound) if spec is not None else None
        if value is None:
            return math.inf if bound == "max" else -math.inf
        return float(value)

    # I/O
    def send(self, commands: Sequence[str], operation: str) -> None:
        """Write ``commands`` in order, then read the error queue.

        Raises
        ------
        SCPIError
            The instrument queued an error.
        """
        for command in commands:
            self.session.write(command)
        self.session.check_errors(after="; ".join(commands) or operation)

    def teardown(self) -> None:
        """Send the driver's teardown sequence."""
        if self.spec.teardown:
            self.send(list(self.spec.teardown), "teardown")

    def close(self) -> None:
        """Run the teardown and close the session (closed even if teardown fails)."""
        if not self.session.is_open:
            return
        try:
            self.teardown()
        finally:
            self.session.close()

    def __enter__(self) -> TemplateInstrument:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _need(self, key: str) -> Any:
        value = getattr(self.spec, key, None)
        if value is None:
            raise DriverError(f"driver {self.spec.name!r} has no {key!r} templates;"
                              " its Python class must implement this operation")
        return value


class TemplateGenerator(TemplateInstrument):
    """A sine generator driven by a :class:`GeneratorDriver`."""

    spec: GeneratorDriver

    def __init__(self, session: Session, spec: GeneratorDriver,
                 caps: GeneratorCaps | None = None) -> None:
        self._amplitude_vpp: float | None = None
        self._offset_v: float | None = None
        super().__init__(session, spec, caps)

    @property
    def max_frequency_hz(self) -> float:
        """Highest frequency allowed: the driver's limit or the bench cap."""
        return min(self.limit("frequency_hz", "max"), self.caps.max_frequency_hz or math.inf)

    @property
    def max_amplitude_vpp(self) -> float:
        """Highest amplitude allowed: the driver's limit or the bench cap."""
        return min(self.limit("amplitude_vpp", "max"),
                   self.caps.max_amplitude_vpp or math.inf)

    def set_caps(self, caps: GeneratorCaps) -> None:
        """Enforce the bench file's caps from now on."""
        self.caps = caps

    def _check(self, frequency_hz: float | None = None, amplitude_vpp: float | None = None,
               offset_v: float | None = None) -> dict[str, str]:
        """Format every given value; SafetyError/DriverError before anything is sent."""
        out: dict[str, str] = {}
        caps = self.caps
        if frequency_hz is not None:
            out["frequency_hz"] = self.number("frequency_hz", frequency_hz)
            if caps.max_frequency_hz is not None and frequency_hz > caps.max_frequency_hz:
                raise SafetyError(f"frequency {frequency_hz:g} Hz is above the bench cap"
                                  f" {caps.max_frequency_hz:g} Hz; nothing was sent")
        if amplitude_vpp is not None:
            out["amplitude_vpp"] = self.number("amplitude_vpp", amplitude_vpp)
            if caps.max_amplitude_vpp is not None and amplitude_vpp > caps.max_amplitude_vpp:
                raise SafetyError(f"amplitude {amplitude_vpp:g} Vpp is above the bench cap"
                                  f" {caps.max_amplitude_vpp:g} Vpp; nothing was sent")
        if offset_v is not None:
            out["offset_v"] = self.number("offset_v", offset_v)
        amplitude = amplitude_vpp if amplitude_vpp is not None else self._amplitude_vpp
        offset = offset_v if offset_v is not None else self._offset_v
        if amplitude is not None:
            peak_v = abs(offset or 0.0) + amplitude / 2
            if self.spec.peak_v is not None and peak_v > self.spec.peak_v * (1 + 1e-12):
                raise DriverError(f"|offset| + amplitude/2 = {peak_v:g} V is above the limit"
                                  f" {self.spec.peak_v:g} V of driver {self.spec.name!r};"
                                  " nothing was sent")
            if caps.max_peak_v is not None and peak_v > caps.max_peak_v:
                raise SafetyError(f"|offset| + amplitude/2 = {peak_v:g} V is above the bench"
                                  f" cap {caps.max_peak_v:g} V; nothing was sent")
        return out

    def set_sine(self, frequency_hz: float, amplitude_vpp: float, offset_v: float = 0.0
                 ) -> None:
        """Select a sine and set frequency, amplitude and offset (output unchanged).

        The amplitude goes first when it shrinks and last when it grows, so no
        intermediate state exceeds the peak limit the instrument enforces, and the new
        frequency never sees the larger of the old and new amplitudes (the output may
        be on, e.g. after a reconnect).
        """
        fields = self._check(frequency_hz, amplitude_vpp, offset_v)
        commands = self._need("commands")
        if self._amplitude_vpp is None:
            self._amplitude_vpp = self.session.query_float(self._need("readback").amplitude_vpp)
        amplitude_cmds = [render(t, fields) for t in commands.set_amplitude]
        offset_cmds = [render(t, fields) for t in commands.set_offset]
        frequency_cmds = [render(t, fields) for t in commands.set_frequency]
        ordered = (amplitude_cmds + offset_cmds + frequency_cmds
                   if amplitude_vpp <= self._amplitude_vpp
                   else frequency_cmds + offset_cmds + amplitude_cmds)
        sequence = [render(t, fields) for t in commands.select_sine] + ordered
        self.send(sequence, "set_sine")
        self._amplitude_vpp, self._offset_v = float(amplitude_vpp), float(offset_v)

    def set_frequency(self, frequency_hz: float) -> None:
        """Change the frequency only."""
        fields = self._check(frequency_hz=frequency_hz)
        self.send([render(t, fields) for t in self._need("commands").set_frequency],
                  "set_frequency")

    def set_amplitude(self, amplitude_vpp: float) -> None:
        """Change the peak-to-peak amplitude only."""
        fields = self._check(amplitude_vpp=amplitude_vpp)
        self.send([render(t, fields) for t in self._need("commands").set_amplitude],
                  "set_amplitude")
        self._amplitude_vpp = float(amplitude_vpp)

    def set_offset(self, offset_v: float) -> None:
        """Change the DC offset only."""
        fields = self._check(offset_v=offset_v)
        self.send([render(t, fields) for t in self._need("commands").set_offset],
                  "set_offset")
        self._offset_v = float(offset_v)

    def set_output(self, on: bool) -> None:
        """Switch the output on or off."""
        if not isinstance(on, bool | np.bool_):
            raise DriverError(f"output must be True or False, got {on!r}; nothing was sent")
        fields = {"output": self.word("output", "on" if on else "off")}
        self.send([render(t, fields) for t in self._need("commands").set_output],
                  "set_output")

    def read_settings(self) -> GeneratorSettings:
        """Read frequency, amplitude, offset and output state back."""
        readback = self._need("readback")
        frequency_hz = self.session.query_float(readback.frequency_hz)
        amplitude_vpp = self.session.query_float(readback.amplitude_vpp)
        offset_v = self.session.query_float(readback.offset_v)
        reply = self.session.query(readback.output.query).strip()
        if reply in readback.output.true_replies:
            output_on = True
        elif reply in readback.output.false_replies:
            output_on = False
        else:
            expected = [*readback.output.true_replies, *readback.output.false_replies]
            raise InstrumentError(f"{self.session.resource_name}: {readback.output.query!r}"
                                  f" answered {reply!r}; expected one of {expected}")
        self._amplitude_vpp, self._offset_v = amplitude_vpp, offset_v
        return GeneratorSettings(frequency_hz, amplitude_vpp, offset_v, output_on)

    def teardown(self) -> None:
        """Output off first, then the driver's teardown sequence."""
        if getattr(self.spec, "commands", None) is not None:
            self.set_output(False)
        super().teardown()


class TemplateScope(TemplateInstrument):
    """A scope driven by a :class:`ScopeDriver`."""

    spec: ScopeDriver

    def __init__(self, session: Session, spec: ScopeDriver,
                 caps: GeneratorCaps | None = None) -> None:
        self._settings: dict[int, ChannelSettings] = {}
        self.sample_rate_hz: float | None = None
        super().__init__(session, spec, caps)

    def channel(self, channel: Any) -> str:
        """A channel number of the driver's ``channels``, as text.

        Raises
        ------
        DriverError
            Not one of the channels.
        """
        if (isinstance(channel, bool) or not isinstance(channel, int | np.integer)
                or int(channel) not in self.spec.channels):
            raise DriverError(f"channel must be one of {self.spec.channels}, got {channel!r};"
                              " nothing was sent")
        return str(int(channel))

    def set_channel(self, channel: int, settings: ChannelSettings) -> None:
        """Apply vertical settings to one channel (probe attenuation first)."""
        scale = settings.scale_v_per_div
        fields = {
            "channel": self.channel(channel),
            "probe_ratio": self.number("probe_ratio", settings.probe_attenuation),
        }
        ratio = float(settings.probe_attenuation)
        fields["volts_per_div"] = self.number("volts_per_div", scale, ratio)
        fields |= {
            "full_range_v": self.number("full_range_v", scale * SCREEN_DIVISIONS, ratio),
            "offset_v": self.number("offset_v", settings.offset_v, ratio),
            "coupling": self.word("coupling", settings.coupling),
        }
        self.send([render(t, fields) for t in self._need("commands").set_channel],
                  "set_channel")
        self._settings[int(channel)] = settings

    def set_timebase(self, record_length: int, sample_rate_hz: float) -> float:
        """Ask for a record length and sample rate; returns the actual sample rate."""
        fields = {"points": self.number("points", record_length),
                  "sample_rate_hz": self.number("sample_rate_hz", sample_rate_hz)}
        self.send([render(t, fields) for t in self._need("commands").set_timebase],
                  "set_timebase")
        actual = self.session.query_float(self._need("readback").sample_rate_hz)
        if not actual > 0:
            raise InstrumentError(f"{self.session.resource_name}: the scope reports a sample"
                                  f" rate of {actual!r}")
        self.sample_rate_hz = actual
        return actual

    def set_trigger(self, channel: int, level_v: float = 0.0, slope: str = "rise") -> None:
        """Edge trigger on ``channel`` at ``level_v`` on a rising or falling slope."""
        fields = {"channel": self.channel(channel),
                  "level_v": self.number("level_v", level_v),
                  "slope": self.word("slope", slope)}
        self.send([render(t, fields) for t in self._need("commands").set_trigger],
                  "set_trigger")

    def _wait_done(self, timeout_s: float) -> None:
        acquisition = self._need("acquisition")
        if acquisition.complete == "opc":
            self.session.wait_complete(timeout_s)
            return
        deadline = time.monotonic() + timeout_s
        while True:
            reply = self.session.query(acquisition.poll_query).strip()
            if reply == acquisition.done_reply:
                return
            if time.monotonic() > deadline:
                raise InstrumentTimeout(
                    f"{self.session.resource_name}: the acquisition did not complete within"
                    f" {timeout_s:g} s ({acquisition.poll_query!r} still answers {reply!r});"
                    " check the trigger source and level")
            time.sleep(acquisition.poll_interval_s)

    def acquire(self, channels: Sequence[int], timeout_s: float = 10.0) -> Capture:
        """One acquisition of ``channels`` on one trigger, read back in volts."""
        if isinstance(channels, int | str | bytes) or not hasattr(channels, "__iter__"):
            raise DriverError(f"channels must be a list of channel numbers, got {channels!r}")
        channels = list(channels)
        if not channels:
            raise DriverError("channels must not be empty")
        texts = [self.channel(c) for c in channels]
        if not timeout_s > 0:
            raise DriverError(f"timeout_s must be positive, got {timeout_s!r}")
        acquisition = self._need("acquisition")
        waveform = self._need("waveform")
        for command in acquisition.start:
            self.session.write(command)
        self._wait_done(timeout_s)
        volts: dict[int, np.ndarray] = {}
        clipped: dict[int, bool] = {}
        x_increments = []
        for channel, text in zip(channels, texts, strict=True):
            fields = {"channel": text}
            for template in waveform.select:
                self.session.write(render(template, fields))
            if waveform.format == "binary":
                v, x_inc, clip = self._read_binary(waveform, fields)
                clipped[int(channel)] = clip
            else:
                v, x_inc = self._read_ascii(waveform, fields)
            volts[int(channel)] = v
            x_increments.append(x_inc)
        self.session.check_errors(after="acquisition")
        lengths = {len(v) for v in volts.values()}
        if len(lengths) != 1:
            raise InstrumentError(f"{self.session.resource_name}: channels returned records"
                                  f" of different lengths {sorted(lengths)}")
        if not x_increments[0] > 0:
            raise InstrumentError(f"{self.session.resource_name}: sample interval"
                                  f" {x_increments[0]!r} s is not positive")
        settings = {int(c): self._settings[int(c)] for c in channels if int(c) in self._settings}
        return Capture(sample_rate_hz=1.0 / x_increments[0], volts=volts, settings=settings,
                       adc_clipped=clipped)

    def _read_binary(self, waveform: Any, fields: dict[str, str]
                     ) -> tuple[np.ndarray, float, bool]:
        preamble = waveform.preamble
        reply = self.session.query(render(preamble.query, fields))
        parts = [p.strip() for p in reply.split(preamble.separator)]
        try:
            def part(index: int) -> float:
                return float(parts[index])
            points = part(preamble.points)
            x_inc = part(preamble.x_increment_s)
            y_inc = part(preamble.y_increment_v)
            y_origin = part(preamble.y_origin_v)
            y_ref = part(preamble.y_reference)
        except (IndexError, ValueError) as exc:
            raise InstrumentError(f"{self.session.resource_name}: cannot read the preamble"
                                  f" {reply[:80]!r}") from exc
        codes = self.session.query_samples(render(waveform.data_query, fields),
                                           waveform.data_type, waveform.byte_order)
        if len(codes) != int(points):
            raise InstrumentError(f"{self.session.resource_name}: the preamble announces"
                                  f" {int(points)} points, the block holds {len(codes)}")
        clip = False
        if np.issubdtype(codes.dtype, np.integer) and codes.size:
            info = np.iinfo(codes.dtype)
            clip = bool(codes.min() == info.min or codes.max() == info.max)
        volts = (codes.astype(np.float64) - y_ref) * y_inc + y_origin
        return volts, x_inc, clip

    def _read_ascii(self, waveform: Any, fields: dict[str, str]) -> tuple[np.ndarray, float]:
        reply = self.session.query(render(waveform.data_query, fields))
        try:
            volts = np.array([float(x) for x in reply.split(waveform.separator)],
                             dtype=np.float64)
        except ValueError as exc:
            raise InstrumentError(f"{self.session.resource_name}: the waveform reply is not"
                                  f" numbers separated by {waveform.separator!r}:"
                                  f" {reply[:80]!r}") from exc
        x_inc = self.session.query_float(render(waveform.x_increment_query, fields))
        return volts, x_inc


class TemplateSwitch(TemplateInstrument):
    """A loop switch driven by a :class:`SwitchDriver`."""

    spec: SwitchDriver

    def set_closed(self, closed: bool) -> None:
        """Close (True) or open (False) the loop."""
        if not isinstance(closed, bool | np.bool_):
            raise DriverError(f"closed must be True or False, got {closed!r}")
        commands = self._need("commands")
        self.send(list(commands.close_loop if closed else commands.open_loop),
                  "set_closed")

    def read_closed(self) -> bool:
        """Read the switch state back (needs ``readback: closed:``)."""
        return self._state(self._need("readback").closed)

    @property
    def can_join_probes(self) -> bool:
        """True when the driver has ``join_probes`` / ``separate_probes`` commands."""
        commands = getattr(self.spec, "commands", None)
        return commands is not None and commands.join_probes is not None

    def set_probes_joined(self, joined: bool) -> None:
        """Put channel 2's probe on channel 1's node (True) or back on its own (False).

        Raises
        ------
        DriverError
            ``joined`` is not a bool, or the driver cannot join probes; nothing was sent.
        """
        if not isinstance(joined, bool | np.bool_):
            raise DriverError(f"joined must be True or False, got {joined!r}")
        if not self.can_join_probes:
            raise DriverError(f"driver {self.spec.name!r} has no join_probes /"
                              " separate_probes commands; this switch cannot join the"
                              " probes (use switch: prompt on the calibrate step)")
        commands = self.spec.commands
        self.send(list(commands.join_probes if joined else commands.separate_probes),
                  "set_probes_joined")

    def read_probes_joined(self) -> bool:
        """Read the probe relay back (needs ``readback: probes_joined:``)."""
        readback = self._need("readback")
        if readback.probes_joined is None:
            raise DriverError(f"driver {self.spec.name!r} has no 'readback: probes_joined'"
                              " query")
        return self._state(readback.probes_joined)

    def _state(self, state: Any) -> bool:
        reply = self.session.query(state.query).strip()
        if reply in state.true_replies:
            return True
        if reply in state.false_replies:
            return False
        raise InstrumentError(f"{self.session.resource_name}: {state.query!r} answered"
                              f" {reply!r}")

    def teardown(self) -> None:
        """Leave the loop open and the probes apart, then the driver's teardown sequence."""
        if getattr(self.spec, "commands", None) is not None:
            self.set_closed(False)
            if self.can_join_probes:
                self.set_probes_joined(False)
        super().teardown()
