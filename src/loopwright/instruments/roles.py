"""The roles the runner knows: Generator, Scope, LoopSwitch and ProbeSwitch.

The runner speaks only these Protocols; it never sees a SCPI string. Drivers
(:mod:`loopwright.instruments.driver`) implement them for a command dialect.

Conventions (SI units everywhere, units in names):

- A scope screen is :data:`SCREEN_DIVISIONS` divisions high. A channel's
  ``offset_v`` is the voltage at the centre of the screen, so the ADC spans
  ``offset_v +- scale_v_per_div * SCREEN_DIVISIONS / 2``.
- Channel numbers start at 1.
- Generator amplitudes are peak-to-peak volts into the load the generator assumes.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal, Protocol, runtime_checkable

import numpy as np

#: Vertical divisions of a scope screen (common practice: 8).
SCREEN_DIVISIONS = 8

Coupling = Literal["AC", "DC"]
Slope = Literal["rise", "fall"]


@dataclass(frozen=True)
class GeneratorSettings:
    """What a generator reports it is doing (read back from the instrument)."""

    frequency_hz: float
    amplitude_vpp: float
    offset_v: float
    output_on: bool


@dataclass(frozen=True)
class ChannelSettings:
    """One scope channel's vertical settings."""

    scale_v_per_div: float
    offset_v: float = 0.0
    coupling: Coupling = "DC"
    probe_attenuation: float = 1.0

    @property
    def low_v(self) -> float:
        """Lowest voltage the ADC can show."""
        return self.offset_v - self.scale_v_per_div * SCREEN_DIVISIONS / 2

    @property
    def high_v(self) -> float:
        """Highest voltage the ADC can show."""
        return self.offset_v + self.scale_v_per_div * SCREEN_DIVISIONS / 2


@dataclass
class Capture:
    """One acquisition of several channels on one trigger.

    Attributes
    ----------
    sample_rate_hz
        The actual sample rate the scope reports (may differ from the one asked).
    volts
        Channel number -> samples in volts (at the probe tip: attenuation applied).
    settings
        Channel number -> the vertical settings in force during the acquisition.
    adc_clipped
        Channel number -> True when the instrument's raw codes hit the ADC's
        extremes (binary formats only; the codes say more than the volts can).
    """

    sample_rate_hz: float
    volts: dict[int, np.ndarray]
    settings: dict[int, ChannelSettings] = field(default_factory=dict)
    adc_clipped: dict[int, bool] = field(default_factory=dict)

    @property
    def record_length(self) -> int:
        """Samples per channel."""
        return len(next(iter(self.volts.values())))

    def time_s(self) -> np.ndarray:
        """Sample times from the trigger, in seconds."""
        return np.arange(self.record_length) / self.sample_rate_hz

    def clipped(self, channel: int, tolerance_div: float = 0.02) -> bool:
        """True when any sample of ``channel`` sits on the top or bottom of the screen.

        Also True when the raw codes hit the ADC's extremes (:attr:`adc_clipped`).
        """
        if self.adc_clipped.get(channel, False):
            return True
        chan = self.settings.get(channel)
        if chan is None:
            return False
        v = self.volts[channel]
        margin = tolerance_div * chan.scale_v_per_div
        return bool(np.any(v >= chan.high_v - margin) or np.any(v <= chan.low_v + margin))


@runtime_checkable
class Generator(Protocol):
    """A sine source: the stimulus of the loop."""

    identity: str
    max_frequency_hz: float
    max_amplitude_vpp: float

    def set_sine(self, frequency_hz: float, amplitude_vpp: float, offset_v: float = 0.0) -> None:
        """Select a sine and set frequency, amplitude and offset (output unchanged)."""

    def set_frequency(self, frequency_hz: float) -> None:
        """Change the frequency only."""

    def set_amplitude(self, amplitude_vpp: float) -> None:
        """Change the peak-to-peak amplitude only."""

    def set_output(self, on: bool) -> None:
        """Switch the output on or off."""

    def read_settings(self) -> GeneratorSettings:
        """Read frequency, amplitude, offset and output state back from the instrument."""

    def close(self) -> None:
        """Run the driver's teardown (output off first) and close the session."""


@runtime_checkable
class Scope(Protocol):
    """A two-or-more channel digitizer that captures all channels on one trigger."""

    identity: str

    def set_channel(self, channel: int, settings: ChannelSettings) -> None:
        """Apply vertical settings to one channel."""

    def set_timebase(self, record_length: int, sample_rate_hz: float) -> float:
        """Ask for a record length and sample rate; returns the actual sample rate."""

    def set_trigger(self, channel: int, level_v: float = 0.0, slope: Slope = "rise") -> None:
        """Edge trigger on ``channel``."""

    def acquire(self, channels: Sequence[int], timeout_s: float = 10.0) -> Capture:
        """One acquisition of ``channels`` on one trigger, read back in volts."""

    def close(self) -> None:
        """Run the driver's teardown and close the session."""


@runtime_checkable
class LoopSwitch(Protocol):
    """Something that opens or closes the loop (a relay, or the operator)."""

    def set_closed(self, closed: bool) -> None:
        """Close (True: the loop feeds itself) or open (False: the generator drives it)."""

    def close(self) -> None:
        """Leave the loop open and release the instrument."""


@runtime_checkable
class ProbeSwitch(Protocol):
    """Something that puts channel 2's probe on channel 1's node (a channel calibration).

    Joined, both channels see one voltage, so channel 2 / channel 1 is the channels'
    own mismatch (probes, cables, inputs). A relay box may be both a
    :class:`LoopSwitch` and a ProbeSwitch.
    """

    can_join_probes: bool

    def set_probes_joined(self, joined: bool) -> None:
        """Join the probes on one node (True) or put channel 2's back on its own (False)."""

    def close(self) -> None:
        """Leave the probes apart and release the instrument."""
