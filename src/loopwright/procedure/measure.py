"""One point of a sweep: autorange, acquire, estimate, average, flag.

This module knows the Scope role and the dsp estimators, never SCPI. It takes the
generator as already set and settled; the runner does that.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from loopwright.dsp import estimate_point, wrap_phase_deg
from loopwright.errors import DriverError, EstimationError
from loopwright.instruments.roles import SCREEN_DIVISIONS, Capture, ChannelSettings, Scope

#: The 1-2-5 ladder of scope scales, volts per division (common practice).
SCALE_LADDER_V_PER_DIV = tuple(
    m * 10.0**e for e in range(-3, 2) for m in (1.0, 2.0, 5.0)
)
#: Fraction of the screen the signal should fill after autoranging.
FILL_LOW = 0.5
FILL_HIGH = 0.92
MAX_AUTORANGE_TRIES = 8


@dataclass(frozen=True)
class QualityLimits:
    """Thresholds that flag a point (they do not stop the sweep)."""

    min_snr_db: float = 20.0
    max_thd_pct: float = 5.0
    unsettled_sigma: float = 4.0


@dataclass
class PointResult:
    """A measured point, ready to be written as a row of points.csv."""

    frequency_hz: float
    gain: complex
    gain_db: float
    phase_deg: float
    gain_db_std: float
    phase_deg_std: float
    reference_amplitude_v: float
    response_amplitude_v: float
    reference_snr_db: float
    response_snr_db: float
    reference_thd_pct: float
    response_thd_pct: float
    reference_scale_v_per_div: float
    response_scale_v_per_div: float
    sample_rate_hz: float
    record_length: int
    averages: int
    flags: list[str] = field(default_factory=list)
    captures: list[Capture] = field(default_factory=list)


def scale_for(peak_to_peak_v: float) -> float:
    """Smallest ladder scale whose screen holds ``peak_to_peak_v`` below FILL_HIGH."""
    for scale in SCALE_LADDER_V_PER_DIV:
        if peak_to_peak_v <= FILL_HIGH * 0.95 * scale * SCREEN_DIVISIONS:
            return scale
    return SCALE_LADDER_V_PER_DIV[-1]


def _next_scale_up(scale: float) -> float:
    for candidate in SCALE_LADDER_V_PER_DIV:
        if candidate > scale * 1.01:
            return candidate
    return scale


class PointMeasurer:
    """Autoranges, acquires and estimates points on one scope.

    Parameters
    ----------
    scope
        The scope role.
    reference_channel, response_channel
        Channel numbers of the stimulus and the returned signal.
    channel_settings
        Starting vertical settings per channel; they carry over from point to point,
        which saves autorange acquisitions on smooth responses.
    estimator
        Name of the dsp estimator.
    quality
        Flag thresholds.
    """

    def __init__(
        self,
        scope: Scope,
        reference_channel: int,
        response_channel: int,
        channel_settings: dict[int, ChannelSettings],
        estimator: str = "sinefit",
        quality: QualityLimits | None = None,
        timeout_s: float = 10.0,
    ) -> None:
        self.scope = scope
        self.reference_channel = reference_channel
        self.response_channel = response_channel
        self.channels = (reference_channel, response_channel)
        self.settings = dict(channel_settings)
        self.estimator = estimator
        self.quality = quality or QualityLimits()
        self.timeout_s = timeout_s
        for channel in self.channels:
            self.scope.set_channel(channel, self.settings[channel])

    def rebind(self, scope: Scope) -> None:
        """Use a reopened scope and put the channels' settings back on it."""
        self.scope = scope
        for channel in self.channels:
            self.scope.set_channel(channel, self.settings[channel])

    def _apply(self, channel: int, settings: ChannelSettings) -> bool:
        """Set a channel; False when the scope refuses the scale (end of its range)."""
        try:
            self.scope.set_channel(channel, settings)
        except DriverError:
            return False
        self.settings[channel] = settings
        return True

    def acquire_ranged(self, autorange: bool) -> tuple[Capture, bool]:
        """Acquire both channels, re-acquiring until neither clips nor under-ranges.

        Returns
        -------
        capture, clipped
            The last capture and whether a channel still clips after the tries.
        """
        for _ in range(MAX_AUTORANGE_TRIES):
            capture = self.scope.acquire(self.channels, timeout_s=self.timeout_s)
            if not autorange:
                break
            changed = False
            for channel in self.channels:
                current = self.settings[channel]
                volts = capture.volts[channel]
                if capture.clipped(channel):
                    bigger = _next_scale_up(_next_scale_up(current.scale_v_per_div))
                    if bigger > current.scale_v_per_div:
                        changed |= self._apply(channel, replace(current, scale_v_per_div=bigger))
                    continue
                low, high = float(np.min(volts)), float(np.max(volts))
                span = high - low
                centre = 0.5 * (high + low)
                screen = current.scale_v_per_div * SCREEN_DIVISIONS
                want_scale = scale_for(span)
                off_centre = abs(centre - current.offset_v) > 0.15 * screen
                if span < FILL_LOW * screen or span > FILL_HIGH * screen or off_centre:
                    new_offset = round(centre / (want_scale / 10)) * (want_scale / 10)
                    if current.coupling == "AC":
                        new_offset = 0.0
                    candidate = replace(current, scale_v_per_div=want_scale,
                                        offset_v=new_offset)
                    if candidate != current:
                        changed |= self._apply(channel, candidate)
            if not changed:
                break
        clipped = any(capture.clipped(channel) for channel in self.channels)
        return capture, clipped

    def measure(
        self,
        frequency_hz: float,
        *,
        averages: int = 1,
        until_phase_std_deg: float | None = None,
        max_averages: int = 16,
        autorange: bool = True,
        correction: Callable[[float], complex] | None = None,
        keep_captures: bool = False,
    ) -> PointResult:
        """Measure one point at the generator's present frequency.

        Parameters
        ----------
        frequency_hz
            The nominal stimulus frequency (the estimator refines it).
        averages
            Records to average (at least this many).
        until_phase_std_deg
            When given, keep acquiring until the phase std of the mean falls below
            it, or ``max_averages`` records.
        max_averages
            Most records when averaging until ``until_phase_std_deg``.
        autorange
            Adjust the channels' scales and offsets on the first record.
        correction
            Channel mismatch at a frequency (from calibrate_channels); H is divided by it.
        keep_captures
            Keep every record in :attr:`PointResult.captures`.

        Returns
        -------
        PointResult
            The averaged ratio, its spread, per-channel figures and flags.
        """
        estimates = []
        captures: list[Capture] = []
        clipped_any = False
        target = max(1, averages)
        limit = max(target, max_averages if until_phase_std_deg else target)
        capture = None
        while True:
            capture, clipped = self.acquire_ranged(autorange if not estimates else False)
            clipped_any |= clipped
            if keep_captures:
                captures.append(capture)
            estimates.append(
                estimate_point(
                    capture.volts[self.reference_channel],
                    capture.volts[self.response_channel],
                    capture.sample_rate_hz,
                    frequency_hz,
                    method=self.estimator,
                )
            )
            count = len(estimates)
            if count >= limit:
                break
            if count < target:
                continue
            if until_phase_std_deg is None:
                break
            if count >= 2 and _phase_std_of_mean(estimates) <= until_phase_std_deg:
                break
        assert capture is not None
        return self._combine(estimates, capture, clipped_any, correction, captures)

    def _combine(self, estimates, capture: Capture, clipped: bool,
                 correction: Callable[[float], complex] | None,
                 captures: list[Capture]) -> PointResult:
        count = len(estimates)
        gains = np.array([e.gain for e in estimates])
        gain = complex(np.mean(gains))
        root_n = math.sqrt(count)
        fit_gain_std = float(np.sqrt(np.mean([e.gain_db_std**2 for e in estimates]))) / root_n
        fit_phase_std = float(np.sqrt(np.mean([e.phase_deg_std**2 for e in estimates]))) / root_n
        if count >= 3:
            # scatter of the records covers drift the fit residuals cannot see
            gdb = 20 * np.log10(np.abs(gains))
            ph = np.degrees(np.angle(gains / gain))
            gain_db_std = max(fit_gain_std, float(np.std(gdb, ddof=1)) / math.sqrt(count))
            phase_deg_std = max(fit_phase_std, float(np.std(ph, ddof=1)) / math.sqrt(count))
        else:
            gain_db_std, phase_deg_std = fit_gain_std, fit_phase_std
        frequency_hz = float(np.mean([e.frequency_hz for e in estimates]))
        if correction is not None:
            gain = gain / correction(frequency_hz)
        flags: list[str] = []
        if clipped:
            flags.append("clipped")
        snr_ref = float(np.mean([e.reference.snr_db for e in estimates]))
        snr_resp = float(np.mean([e.response.snr_db for e in estimates]))
        if min(snr_ref, snr_resp) < self.quality.min_snr_db:
            flags.append("low_snr")
        thd_resp = float(np.mean([e.response.thd_pct for e in estimates]))
        if thd_resp > self.quality.max_thd_pct:
            flags.append("nonlinear")
        if self._unsettled(estimates, capture):
            flags.append("unsettled")
        return PointResult(
            frequency_hz=frequency_hz,
            gain=gain,
            gain_db=20 * math.log10(max(abs(gain), 1e-300)),
            phase_deg=wrap_phase_deg(math.degrees(math.atan2(gain.imag, gain.real))),
            gain_db_std=gain_db_std,
            phase_deg_std=phase_deg_std,
            reference_amplitude_v=float(np.mean([e.reference.amplitude_v for e in estimates])),
            response_amplitude_v=float(np.mean([e.response.amplitude_v for e in estimates])),
            reference_snr_db=snr_ref,
            response_snr_db=snr_resp,
            reference_thd_pct=float(np.mean([e.reference.thd_pct for e in estimates])),
            response_thd_pct=thd_resp,
            reference_scale_v_per_div=self.settings[self.reference_channel].scale_v_per_div,
            response_scale_v_per_div=self.settings[self.response_channel].scale_v_per_div,
            sample_rate_hz=capture.sample_rate_hz,
            record_length=capture.record_length,
            averages=count,
            flags=flags,
            captures=captures,
        )

    def _unsettled(self, estimates, capture: Capture) -> bool:
        """Two consecutive records (or the two halves of a lone record) disagree."""
        if len(estimates) >= 2:
            first, second = estimates[0], estimates[1]
        else:
            half = capture.record_length // 2
            try:
                # three-parameter fits at the refined frequency: cheap, and a transient
                # shows as a gain/phase change between the halves
                first, second = (
                    estimate_point(capture.volts[self.reference_channel][part],
                                   capture.volts[self.response_channel][part],
                                   capture.sample_rate_hz, estimates[0].frequency_hz,
                                   method="sinefit", refine=False, harmonics=1)
                    for part in (slice(0, half), slice(half, 2 * half))
                )
            except EstimationError:
                return False  # too few cycles per half to tell
        k = self.quality.unsettled_sigma
        dphase = abs(wrap_phase_deg(first.phase_deg - second.phase_deg))
        dgain = abs(first.gain_db - second.gain_db)
        phase_tol = k * math.hypot(first.phase_deg_std, second.phase_deg_std) + 0.02
        gain_tol = k * math.hypot(first.gain_db_std, second.gain_db_std) + 0.002
        return dphase > phase_tol or dgain > gain_tol


def _phase_std_of_mean(estimates) -> float:
    gains = np.array([e.gain for e in estimates])
    phases = np.degrees(np.angle(gains / np.mean(gains)))
    return float(np.std(phases, ddof=1) / math.sqrt(len(gains)))
