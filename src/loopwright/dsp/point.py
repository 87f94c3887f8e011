"""The result of one gain/phase point and the checks every estimator shares."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from loopwright.errors import EstimationError

__all__ = [
    "ChannelEstimate",
    "PointEstimate",
    "channel_from_phasors",
    "check_records",
    "db_std_from_log_var",
    "make_point",
    "no_reference_error",
    "snr_db",
    "wrap_phase_deg",
]

MIN_SAMPLES = 16


def wrap_phase_deg(phase_deg: float) -> float:
    """Wrap a phase to (-180, 180] degrees."""
    wrapped = math.fmod(phase_deg + 180.0, 360.0)
    if wrapped <= 0.0:
        wrapped += 360.0
    return wrapped - 180.0


def db_std_from_log_var(var_ln: float) -> float:
    """Standard deviation in dB of ``20 log10 G`` from the variance of ``ln G``."""
    return 20.0 / math.log(10.0) * math.sqrt(max(var_ln, 0.0))


@dataclass(frozen=True)
class ChannelEstimate:
    """What one channel shows at the stimulus frequency.

    Attributes
    ----------
    amplitude_v
        Amplitude (peak) of the fundamental.
    phase_deg
        Phase of the fundamental at t = 0 in ``A cos(w t + phase)``, (-180, 180].
    offset_v
        DC offset.
    snr_db
        Fundamental power over noise power (harmonics are not noise).
    thd_pct
        sqrt(sum of harmonic powers, orders 2..9 below Nyquist) / fundamental, percent.
    noise_rms_v
        RMS of the noise (what is left after fundamental, harmonics and offset).
    """

    amplitude_v: float
    phase_deg: float
    offset_v: float
    snr_db: float
    thd_pct: float
    noise_rms_v: float

    def to_dict(self) -> dict[str, float | None]:
        """JSON-ready dict (non-finite values become None)."""
        return {k: _finite_or_none(v) for k, v in self.__dict__.items()}


@dataclass(frozen=True)
class PointEstimate:
    """One complex gain point ``H = response / reference``.

    Attributes
    ----------
    frequency_hz
        Frequency the point belongs to (refined by estimators that refine it).
    gain
        Complex ``H``.
    gain_db, phase_deg
        ``20 log10 |H|`` and ``angle(H)`` in (-180, 180].
    gain_db_std, phase_deg_std
        One-sigma uncertainty of gain_db and phase_deg from the noise in the record.
    reference, response
        Per-channel figures.
    method
        Name of the estimator that produced the point.
    details
        Estimator-specific extras (iterations, window, segments, ...).
    """

    frequency_hz: float
    gain: complex
    gain_db: float
    phase_deg: float
    gain_db_std: float
    phase_deg_std: float
    reference: ChannelEstimate
    response: ChannelEstimate
    method: str
    details: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict: the output of ``loopwright ratio --json``."""
        return {
            "frequency_hz": _finite_or_none(self.frequency_hz),
            "gain_db": _finite_or_none(self.gain_db),
            "phase_deg": _finite_or_none(self.phase_deg),
            "gain_db_std": _finite_or_none(self.gain_db_std),
            "phase_deg_std": _finite_or_none(self.phase_deg_std),
            "gain_re": _finite_or_none(self.gain.real),
            "gain_im": _finite_or_none(self.gain.imag),
            "method": self.method,
            "reference": self.reference.to_dict(),
            "response": self.response.to_dict(),
            "details": {k: _json_value(v) for k, v in self.details.items()},
        }


def make_point(
    frequency_hz: float,
    gain: complex,
    var_ln_gain: float,
    var_phase_rad2: float,
    reference: ChannelEstimate,
    response: ChannelEstimate,
    method: str,
    details: dict[str, Any] | None = None,
) -> PointEstimate:
    """Build a :class:`PointEstimate` from ``H`` and the variances of ``ln|H|`` and ``arg H``."""
    return PointEstimate(
        frequency_hz=float(frequency_hz),
        gain=complex(gain),
        gain_db=20.0 * math.log10(abs(gain)) if gain != 0 else -math.inf,
        phase_deg=wrap_phase_deg(math.degrees(math.atan2(gain.imag, gain.real))),
        gain_db_std=db_std_from_log_var(var_ln_gain),
        phase_deg_std=math.degrees(math.sqrt(max(var_phase_rad2, 0.0))),
        reference=reference,
        response=response,
        method=method,
        details=dict(details or {}),
    )


def channel_from_phasors(phasors: NDArray[np.complex128], offset_v: float,
                         noise_var_v2: float) -> ChannelEstimate:
    """Channel figures from its phasors ``A_k exp(j phase_k)`` at the fundamental and
    harmonics (``phasors[0]`` the fundamental), its offset and noise variance."""
    amps = np.abs(phasors)
    return ChannelEstimate(
        amplitude_v=float(amps[0]),
        phase_deg=wrap_phase_deg(math.degrees(float(np.angle(phasors[0])))),
        offset_v=offset_v,
        snr_db=snr_db(float(amps[0]), noise_var_v2),
        thd_pct=100.0 * float(np.sqrt(np.sum(amps[1:] ** 2))) / float(amps[0])
        if amps[0] > 0
        else math.nan,
        noise_rms_v=math.sqrt(noise_var_v2),
    )


def no_reference_error(frequency_hz: float) -> EstimationError:
    """The error of a reference channel with nothing at the stimulus frequency."""
    return EstimationError(
        f"the reference has no component at {frequency_hz:g} Hz: check the stimulus"
    )


def snr_db(amplitude_v: float, noise_var_v2: float) -> float:
    """``10 log10((A^2 / 2) / sigma^2)``; inf for a noise-free record."""
    if noise_var_v2 <= 0:
        return math.inf
    if amplitude_v <= 0:
        return -math.inf
    return 10.0 * math.log10(amplitude_v**2 / 2.0 / noise_var_v2)


def check_records(
    reference_v: Any, response_v: Any, sample_rate_hz: float, frequency_hz: float
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Validate a two-channel record; return both as float64 1-D arrays (never copies to write).

    Raises
    ------
    EstimationError
        Empty or mismatched arrays, NaN/inf, a bad sample rate or frequency, a
        frequency at or above Nyquist, fewer than two cycles, a flat reference.
    """
    ref = np.asarray(reference_v, dtype=np.float64)
    resp = np.asarray(response_v, dtype=np.float64)
    for name, arr in (("reference", ref), ("response", resp)):
        if arr.ndim != 1:
            raise EstimationError(f"the {name} record must be 1-D, got shape {arr.shape}")
        if arr.size == 0:
            raise EstimationError(f"the {name} record is empty: capture some samples")
    if ref.size != resp.size:
        raise EstimationError(
            f"reference and response differ in length ({ref.size} vs {resp.size} samples): "
            "capture both channels over the same record"
        )
    if ref.size < MIN_SAMPLES:
        raise EstimationError(
            f"the record has {ref.size} samples; at least {MIN_SAMPLES} are needed"
        )
    for name, arr in (("reference", ref), ("response", resp)):
        if np.isfinite(np.sum(arr)):  # NaN/inf propagate into the sum
            continue
        bad = ~np.isfinite(arr)
        if bad.any():
            first = int(np.argmax(bad))
            raise EstimationError(
                f"the {name} record has {int(bad.sum())} NaN/inf samples (first at index "
                f"{first}): the scope may have clipped or lost samples; re-capture"
            )
    try:
        fs = float(sample_rate_hz)
        f = float(frequency_hz)
    except (TypeError, ValueError) as exc:
        raise EstimationError("sample_rate_hz and frequency_hz must be numbers") from exc
    if not (math.isfinite(fs) and fs > 0):
        raise EstimationError(f"sample_rate_hz must be a positive number, got {sample_rate_hz!r}")
    if not (math.isfinite(f) and f > 0):
        raise EstimationError(f"frequency_hz must be a positive number, got {frequency_hz!r}")
    n = ref.size
    if f >= fs / 2.0 * (1.0 - 2.0 / n):
        raise EstimationError(
            f"frequency {f:g} Hz is at or above Nyquist ({fs / 2:g} Hz, less one bin): "
            "sample faster or measure a lower frequency"
        )
    cycles = f * n / fs
    if cycles < 2.0:
        raise EstimationError(
            f"the record holds {cycles:.3g} cycles of {f:g} Hz; at least 2 are needed: "
            "capture a longer record or a higher frequency"
        )
    if np.ptp(ref) == 0.0:
        raise EstimationError(
            "the reference channel is flat (constant): check the probe, the channel "
            "settings and that the generator output is on"
        )
    return ref, resp


def _finite_or_none(value: Any) -> float | None:
    v = float(value)
    return v if math.isfinite(v) else None


def _json_value(value: Any) -> Any:
    if isinstance(value, (bool, str)) or value is None:
        return value
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return _finite_or_none(value)
    return str(value)
