"""A DUT built from a stored run: the board as it was measured, served by the bench.

The stored ``H`` (points.csv: sign applied, channel mismatch divided out) is turned
back into what the scope saw, ``raw = sign * H * mismatch``, so that the same
procedure run on the simulated bench stores the same ``H`` again:

- steady state: ``FrequencyResponse.interpolate`` (the model the loop figures use:
  rational AAA fit, PCHIP in log f when the fit is not trusted). At a stored
  frequency it gives the stored value. Outside the stored range the end value is
  held (gain and phase of the first/last point): the run says nothing there, and a
  held value neither invents a resonance nor a roll-off;
- transients and the closed loop: a real rational model of the stored H whose poles
  come from an AAA fit of the data mirrored to negative frequencies (so the poles
  come in conjugate pairs), with poles of negligible pull dropped (noise doublets)
  and the residues refitted by least squares (the fixed-pole step of vector
  fitting), modes the data do not need dropped (the fit stays within 2 sigma rms of
  the stored points without them), strictly proper when that fits. AAA is tried at
  a few tolerances (tight for clean data, loose for noisy data). When every attempt
  has an unstable pole or misses the data by more than :data:`MAX_TRANSIENT_MISFIT`,
  the board has no transient (steady state only; a closed loop then cannot oscillate) and
  ``transient_note`` says why. Closed, the loop runs around that model with a soft
  ``tanh`` limit chosen so that it settles at the stored closed-loop amplitude
  (describing-function balance, :func:`limit_for_amplitude`; 1 V, invented, when the
  run stored none); the open-loop points get no limit (they already hold whatever
  compression the board had);
- noise: each channel's noise at the probe tip from the stored SNR,
  ``amplitude / sqrt(2) / 10**(snr/20)`` (the estimator's SNR is ``A**2/2 / var``),
  less the simulated 12-bit ADC's own quantisation noise at the stored scale (the
  bench adds it back), median over the points: :attr:`channel_noise_v_rms`;
- channel mismatch: with ``mismatch: true`` (default) the response channel carries
  the stored calibration (calibration.csv, interpolated like the runner does).

A DUT file::

    model: measured_response
    run: runs/20260304T050607Z_quick_B17   # a run folder (relative: to the working dir)
    step: 0              # the sweep step to model (default: the last one with points)

``load_dut`` reads it; ``MeasuredResponseDUT.from_run(path)`` builds one in code.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Literal

import numpy as np
from pydantic import Field

from loopwright.errors import InputError
from mock_instruments.duts import register_dut
from mock_instruments.duts.base import DUTModel, DUTParams, LoopSystem
from mock_instruments.lti import Rational, StateSpace

#: Largest relative rms misfit of the transient model to the data (else no transient).
MAX_TRANSIENT_MISFIT = 0.05
#: A pole whose pull at the nearest data point is below this fraction of |H| there is
#: a noise doublet and is dropped from the transient model.
DOUBLET_PULL = 1e-3
#: With per-point sigma, a mode is dropped while the fit without it stays within
#: this many sigma rms of the data.
CHI_OK = 2.0
#: A fitted pole whose term stays below this fraction of |H| at every point is dropped.
WEAK_TERM = 0.01
#: Relative distance within which two fitted poles are one (see _real_pole_set).
POLE_MATCH = 2e-2
#: AAA tolerances tried in turn (tight for clean data, loose for noisy data).
RATIONAL_TOLERANCES = (1e-4, 1e-3, 1e-2, 3e-2)
#: Most terms of the transient fit (a board of higher order is not expected).
MAX_TRANSIENT_TERMS = 14
#: Closed-loop soft limit when the run stored no oscillation amplitude (invented).
DEFAULT_CLOSED_LOOP_LIMIT_V = 1.0
#: The simulated scope's ADC (quantisation noise taken out of the stored noise).
SIM_ADC_BITS = 12
SCREEN_DIVISIONS = 8


class MeasuredParams(DUTParams):
    """Parameters of the ``measured_response`` model (see the module doc)."""

    model: Literal["measured_response"] = "measured_response"
    run: str = Field(description="the run folder whose response the board replays")
    step: int | None = Field(None, ge=0, description="sweep step (default: last with points)")
    mismatch: bool = Field(True, description="response channel carries calibration.csv")
    noise: bool = Field(True, description="channel noise from the stored SNR")
    transient: Literal["auto", "none"] = "auto"


# --------------------------------------------------------------------------- numerics


def hold_outside(frequency_hz: np.ndarray, lo_hz: float, hi_hz: float) -> np.ndarray:
    """Frequencies clipped to ``[lo_hz, hi_hz]``: the model's value is held outside."""
    return np.clip(np.asarray(frequency_hz, dtype=float), lo_hz, hi_hz)


def channel_noise_v_rms(amplitude_v: np.ndarray, snr_db: np.ndarray,
                        scale_v_per_div: np.ndarray | None = None,
                        adc_bits: int = SIM_ADC_BITS) -> float:
    """Median noise (V rms at the probe tip) of one channel over the stored points.

    ``noise = A / sqrt(2) / 10**(snr/20)`` per point (the SNR of
    :func:`loopwright.dsp.point.snr_db` is ``A**2/2 / noise variance``); the
    quantisation noise ``(8 div * scale / 2**bits)**2 / 12`` (uniform rounding,
    (practice)) is taken out in quadrature because the simulated scope adds it again.
    Points without a finite amplitude and SNR are skipped; none left gives 0.
    """
    amp = np.asarray(amplitude_v, dtype=float)
    snr = np.asarray(snr_db, dtype=float)
    variance = (amp / math.sqrt(2.0) / 10.0 ** (snr / 20.0)) ** 2
    if scale_v_per_div is not None and adc_bits > 0:
        step = SCREEN_DIVISIONS * np.asarray(scale_v_per_div, dtype=float) / 2.0**adc_bits
        quantisation = np.where(np.isfinite(step), step**2 / 12.0, 0.0)
        variance = np.maximum(variance - quantisation, 0.0)
    good = np.isfinite(variance)
    if not np.any(good):
        return 0.0
    return float(np.sqrt(np.median(variance[good])))


def tanh_describing_gain(drive_over_limit: float, points: int = 256) -> float:
    """Fundamental gain of ``w = L tanh(v / L)`` for ``v = A sin(theta)``, ``a = A / L``.

    The describing function of a soft limiter (Gelb & Vander Velde, "Multiple-input
    describing functions", 1968 (mem)): 1 for small ``a``, falling towards
    ``4 / (pi a)`` (the ideal limiter's) for large ``a``.
    """
    a = float(drive_over_limit)
    if a <= 0:
        return 1.0
    theta = 2 * np.pi * (np.arange(points) + 0.5) / points
    return float(2.0 * np.mean(np.tanh(a * np.sin(theta)) * np.sin(theta)) / a)


def limit_for_amplitude(amplitude_v: float, loop_gain: float) -> float | None:
    """The soft limit at which a loop of small-signal gain ``loop_gain`` (> 1) settles
    at ``amplitude_v`` on its stage input (describing-function balance ``K N(a) = 1``).

    None when the numbers cannot give a balance (no oscillation, no amplitude).
    """
    from scipy.optimize import brentq

    if not (np.isfinite(amplitude_v) and np.isfinite(loop_gain)) or amplitude_v <= 0 \
            or loop_gain <= 1.0:
        return None
    target = 1.0 / loop_gain
    a = brentq(lambda x: tanh_describing_gain(x) - target, 1e-9, 1e9, xtol=1e-12)
    return float(amplitude_v / a)


def _real_pole_set(poles: np.ndarray) -> list[complex]:
    """One representative per real pole or conjugate pair (upper half-plane).

    The fit of noisy mirrored data gives pairs that are only nearly conjugate and real
    poles with a small imaginary part: a pole within :data:`POLE_MATCH` (relative) of
    the axis is real, and one within that distance of a kept pole's conjugate is its
    partner.
    """
    out: list[complex] = []
    ordered = sorted((complex(p) for p in poles if np.isfinite(p)), key=lambda p: -p.imag)
    for p in ordered:
        if abs(p.imag) <= POLE_MATCH * abs(p):
            candidate = complex(p.real, 0.0)
        else:
            candidate = complex(p.real, abs(p.imag))
        if not any(abs(candidate - kept) <= POLE_MATCH * abs(candidate) for kept in out):
            out.append(candidate)
    return out


def _basis(s: np.ndarray, poles: list[complex]) -> np.ndarray:
    """Real partial-fraction basis: 1, 1/(s-a), and for a pair 2Re/(s-p), 2Im/(s-p)."""
    columns = [np.ones_like(s)]
    for p in poles:
        if p.imag == 0:
            columns.append(1.0 / (s - p.real))
        else:
            a, b = 1.0 / (s - p), 1.0 / (s - np.conj(p))
            columns.append(a + b)
            columns.append(1j * (a - b))
    return np.stack(columns, axis=1)


def _rational_from_basis(coeffs: np.ndarray, poles: list[complex],
                         w_ref: float) -> Rational:
    """The real rational ``d + sum c_k basis_k(s)`` as num/den polynomials in s."""
    # Work in s_hat = s / w_ref (coefficients of similar size), then rescale.
    scaled = [p / w_ref for p in poles]
    factors = []
    for p in scaled:
        factors.append(np.array([1.0, -p.real]) if p.imag == 0
                       else np.array([1.0, -2 * p.real, abs(p) ** 2]))
    den = np.array([1.0])
    for factor in factors:
        den = np.polymul(den, factor)
    num = coeffs[0] * den
    k = 1
    for i, p in enumerate(scaled):
        rest = np.array([1.0])
        for j, factor in enumerate(factors):
            if j != i:
                rest = np.polymul(rest, factor)
        if p.imag == 0:
            term = coeffs[k] / w_ref * rest
            k += 1
        else:
            # c1 (1/(s-p) + 1/(s-p*)) + c2 j (1/(s-p) - 1/(s-p*))
            #   = (2 c1 s - 2 c1 Re p - 2 c2 Im p) / ((s-p)(s-p*)), s = w_ref s_hat
            c1, c2 = coeffs[k], coeffs[k + 1]
            k += 2
            linear = np.array([2 * c1, -2 * c1 * p.real - 2 * c2 * p.imag]) / w_ref
            term = np.polymul(linear, rest)
        num = np.polyadd(num, term)
    n_den, n_num = den.size - 1, num.size - 1
    den_s = den / w_ref ** np.arange(n_den, -1, -1, dtype=float)
    num_s = num / w_ref ** np.arange(n_num, -1, -1, dtype=float)
    return Rational(num_s, den_s)


def transient_model(frequency_hz: np.ndarray, h: np.ndarray,
                    relative_sigma: np.ndarray | None = None
                    ) -> tuple[Rational | None, str]:
    """A stable real rational close to ``h`` for the bench's transients, or None and why.

    Parameters
    ----------
    frequency_hz
        Increasing positive frequencies.
    h
        The complex response at each frequency.
    relative_sigma
        Each point's one-sigma relative error (from the stored gain and phase std);
        with it, fitted modes the data do not need (the fit stays within
        :data:`CHI_OK` sigma rms without them) are dropped.
    """
    f = np.asarray(frequency_hz, dtype=float)
    h = np.asarray(h, dtype=complex)
    sigma = None
    if relative_sigma is not None:
        sigma = np.asarray(relative_sigma, dtype=float)
        if sigma.shape != f.shape or not np.all(np.isfinite(sigma) & (sigma > 0)):
            sigma = None
    if f.size < 4:
        return None, f"{f.size} points are too few for a rational model; steady state only"
    note = "no rational fit tried"
    # A loose tolerance for noisy data: the transient needs the poles, not the noise.
    for rtol in RATIONAL_TOLERANCES:
        model, note = _try_transient_model(f, h, rtol, sigma)
        if model is not None:
            return model, note
    return None, note + "; steady state only (no transient)"


def _fit(s: np.ndarray, h: np.ndarray, poles: list[complex], weight: np.ndarray,
         proper: bool) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least-squares coefficients of the real basis (the constant term left at
    zero unless ``proper``), and the basis."""
    basis = _basis(s, poles)
    rows = np.concatenate([(basis * weight[:, None]).real, (basis * weight[:, None]).imag])
    rhs = np.concatenate([(h * weight).real, (h * weight).imag])
    first = 0 if proper else 1
    coeffs = np.zeros(rows.shape[1])
    coeffs[first:], *_ = np.linalg.lstsq(rows[:, first:], rhs, rcond=None)
    return coeffs, basis


def _chi(s: np.ndarray, h: np.ndarray, poles: list[complex], sigma: np.ndarray) -> float:
    """Rms misfit in units of each point's sigma (constant term allowed)."""
    weight = 1.0 / (np.abs(h) * sigma)
    coeffs, basis = _fit(s, h, poles, weight, True)
    return float(np.sqrt(np.mean(np.abs((basis @ coeffs - h) * weight) ** 2)))


def _prune_poles(s: np.ndarray, h: np.ndarray, poles: list[complex],
                 sigma: np.ndarray | None) -> list[complex]:
    """Drop fitted modes the data do not need.

    With per-point sigma: while leaving one mode out keeps the fit within
    :data:`CHI_OK` sigma rms, leave out the one that matters least. Without: drop modes
    whose term stays below :data:`WEAK_TERM` of |H| at every point.
    """
    kept = list(poles)
    while kept:
        if sigma is not None:
            trials = [_chi(s, h, kept[:i] + kept[i + 1:], sigma) for i in range(len(kept))]
            best = int(np.argmin(trials))
            if trials[best] > CHI_OK:
                break
            del kept[best]
            continue
        coeffs, basis = _fit(s, h, kept, 1.0 / np.abs(h), True)
        strengths = []
        column = 1
        for p in kept:
            width = 1 if p.imag == 0 else 2
            term = basis[:, column:column + width] @ coeffs[column:column + width]
            strengths.append(float(np.max(np.abs(term) / np.abs(h))))
            column += width
        weakest = int(np.argmin(strengths))
        if strengths[weakest] >= WEAK_TERM:
            break
        del kept[weakest]
    return kept


def _try_transient_model(f: np.ndarray, h: np.ndarray, rtol: float,
                         sigma: np.ndarray | None) -> tuple[Rational | None, str]:
    """One attempt of :func:`transient_model` at one AAA tolerance."""
    from scipy.interpolate import AAA

    f_ref = float(np.sqrt(f[0] * f[-1]))
    w_ref = 2 * np.pi * f_ref
    # mirrored data: a real system has H(-jw) = conj(H(jw)), so poles pair up
    z = np.concatenate([1j * f, -1j * f]) / f_ref
    values = np.concatenate([h, np.conj(h)])
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            fit = AAA(z, values, rtol=rtol,
                      max_terms=max(2, min(f.size, MAX_TRANSIENT_TERMS)))
            poles_z = np.asarray(fit.poles(), dtype=complex)
            residues = np.asarray(fit.residues(), dtype=complex)
    except (ValueError, np.linalg.LinAlgError, ZeroDivisionError) as exc:
        return None, f"the rational fit failed ({exc})"
    keep = []
    for p, r in zip(poles_z, residues, strict=True):
        distance = np.abs(p - z)
        nearest = int(np.argmin(distance))
        if abs(r) / distance[nearest] >= DOUBLET_PULL * abs(values[nearest]):
            keep.append(p * w_ref)
    poles = _real_pole_set(np.asarray(keep, dtype=complex))
    unstable = [p for p in poles if p.real >= 0]
    if unstable:
        shown = ", ".join(f"{p / (2 * np.pi):.4g}" for p in unstable[:3])
        return None, f"the rational fit has unstable pole(s) at s/2pi = {shown} Hz"
    s = 2j * np.pi * f
    poles = _prune_poles(s, h, poles, sigma)
    misfit = math.inf
    # Strictly proper first (no feed-through: a closed loop needs no extra fast pole),
    # then with a constant term for responses that flatten out at the top.
    for proper in (False, True):
        coeffs, _ = _fit(s, h, poles, 1.0 / np.abs(h), proper)
        model = _rational_from_basis(coeffs, poles, w_ref)
        misfit = float(np.sqrt(np.mean(np.abs(model.at_hz(f) / h - 1.0) ** 2)))
        if np.isfinite(misfit) and misfit <= MAX_TRANSIENT_MISFIT:
            return model, (f"transients from a rational model with {model.den.size - 1}"
                           f" poles, {misfit:.2g} relative rms from the data")
    return None, f"the rational model misses the data by {misfit:.2g} (relative rms)"


def _relative_sigma(response: Any) -> np.ndarray | None:
    """Each stored point's relative one-sigma error from its gain (dB) and phase std."""
    if response.gain_db_std is None or response.phase_deg_std is None:
        return None
    gain = np.asarray(response.gain_db_std, dtype=float) * math.log(10.0) / 20.0
    phase = np.deg2rad(np.asarray(response.phase_deg_std, dtype=float))
    return np.hypot(gain, phase)


def _closed_loop_limit(summary: dict[str, Any] | None, network: Rational | None
                       ) -> tuple[float, str]:
    """The closed loop's soft limit from a stored run's closed-loop result, and why.

    The loop gain is the closed loop's own: the transient model's gain where its phase
    crosses zero nearest the stored oscillation (the stored excess gain without one).
    """
    summary = summary or {}
    closed = summary.get("closed_loop") or {}
    analysis = summary.get("analysis") or {}
    amplitude = closed.get("amplitude_v") if closed.get("oscillating") else None
    gain = analysis.get("excess_gain")
    f_osc = closed.get("frequency_hz") or analysis.get("oscillation_frequency_hz")
    if network is not None and f_osc:
        gain = float(abs(network.at_hz(float(f_osc))))
    if amplitude is not None and gain is not None:
        limit = limit_for_amplitude(float(amplitude), float(gain))
        if limit is not None:
            return limit, (f"soft limit {limit:.4g} V: settles at the stored {amplitude:.4g} V"
                           f" with a loop gain of {gain:.4g} at the oscillation")
    return DEFAULT_CLOSED_LOOP_LIMIT_V, (
        f"soft limit {DEFAULT_CLOSED_LOOP_LIMIT_V:g} V (invented: the run stored no "
        "closed-loop amplitude)")


# --------------------------------------------------------------------------- bench glue


@dataclass(frozen=True)
class _SteadyStateSpace(StateSpace):
    """A realisation whose steady response is the measured one (transients from A, B, C)."""

    steady: Any = field(default=None, compare=False)

    def response(self, omega_rad_s: float) -> complex:
        return complex(self.steady(np.array([omega_rad_s / (2 * np.pi)]))[0])


@dataclass(frozen=True)
class _MeasuredRational(Rational):
    """The transient model's polynomials with the measured steady response on the jw axis."""

    steady: Any = field(default=None, compare=False)

    def at_hz(self, frequency_hz) -> np.ndarray:
        f = np.asarray(frequency_hz, dtype=float)
        return np.asarray(self.steady(np.atleast_1d(f)), dtype=complex).reshape(f.shape)

    def realise(self) -> StateSpace:
        base = Rational(self.num, self.den).realise()
        return _SteadyStateSpace(base.A, base.B, base.C, base.D, steady=self.steady)


@register_dut
class MeasuredResponseDUT(DUTModel):
    """A board replayed from a stored run (see the module doc)."""

    name = "measured_response"
    description = "a stored run's measured response, noise and channel mismatch (replay)"
    Params = MeasuredParams

    def __init__(self, params: MeasuredParams) -> None:
        from loopwright.errors import LoopwrightError
        from loopwright.store import load_run
        from loopwright.store.load import mismatch_at

        super().__init__(params)
        try:
            run = load_run(params.run)
            response = run.response_for(params.step)
        except LoopwrightError as exc:
            err = ValueError(f"cannot replay the run: {exc}")
            err.field = "run"  # type: ignore[attr-defined]
            raise err from exc
        self.run_path = Path(params.run)
        self.sign = run.sign
        self.response = response
        f = np.asarray(response.frequency_hz, dtype=float)
        self.frequency_range_hz = (float(f[0]), float(f[-1]))
        calibration = run.calibration if params.mismatch else None
        self.has_mismatch = calibration is not None

        def steady(frequency_hz: np.ndarray) -> np.ndarray:
            held = hold_outside(frequency_hz, *self.frequency_range_hz)
            raw = self.sign * response.interpolate(held)
            if calibration is not None:
                raw = raw * mismatch_at(held, *calibration)
            return raw

        self._steady = steady
        self.model_method = response.model().method
        # The rational model is of the loop itself (the stored H): the closed loop runs
        # around it; the response channel's transients use sign * H (the mismatch, a
        # probe effect, is in the steady state only).
        if params.transient == "auto":
            loop, note = transient_model(f, response.interpolate(f),
                                         _relative_sigma(response))
        else:
            loop, note = None, "transients off (transient: none)"
        self.transient_note = note
        self._loop = loop
        shape = loop if loop is not None else Rational.constant(1.0)
        self._channel2 = _MeasuredRational(self.sign * shape.num, shape.den, steady=steady)
        self.closed_loop_limit_v, self.closed_loop_note = _closed_loop_limit(run.summary, loop)
        points = run.points
        if params.step is not None:
            points = points[points["step"] == params.step]
        elif not points.empty:
            points = points[points["step"] == run.steps[-1]]
        if params.noise and not points.empty:
            self.channel_noise_v_rms = (
                channel_noise_v_rms(points["reference_amplitude_v"], points["reference_snr_db"],
                                    points["reference_scale_v_per_div"]),
                channel_noise_v_rms(points["response_amplitude_v"], points["response_snr_db"],
                                    points["response_scale_v_per_div"]))
        else:
            self.channel_noise_v_rms = (0.0, 0.0)

    @classmethod
    def from_run(cls, run_dir: str | Path, **options: Any) -> MeasuredResponseDUT:
        """Build the board of a run folder (options: ``step``, ``mismatch``, ``noise``,
        ``transient``).

        Raises
        ------
        InputError
            The folder is not a run, or its chosen step has fewer than 2 points.
        """
        params = MeasuredParams(run=str(run_dir), **options)
        try:
            return cls(params)
        except ValueError as exc:
            raise InputError(str(exc), path=str(run_dir)) from exc

    def describe(self) -> dict[str, Any]:
        """What the replay modelled, for the manifest."""
        lo, hi = self.frequency_range_hz
        return {
            "run": str(self.run_path),
            "step": self.params.step,
            "frequency_range_hz": [lo, hi],
            "outside_range": "end values held",
            "steady_state": f"FrequencyResponse.interpolate ({self.model_method})",
            "transient": self.transient_note,
            "channel_noise_v_rms": list(self.channel_noise_v_rms),
            "channel_mismatch": "calibration.csv on the response channel"
            if self.has_mismatch else None,
            "closed_loop": self.closed_loop_note,
        }

    def probe_transfer_functions(self) -> tuple[Rational, Rational]:
        return Rational.constant(1.0), self._channel2

    def true_transfer_function(self) -> Rational:
        """The loop's own H (the stored one, sign and mismatch out) as the rational
        model; a constant 1 when the board has no rational model."""
        return self._loop if self._loop is not None else Rational.constant(1.0)

    def loop_system(self) -> LoopSystem:
        """The closed loop: the transient model with the soft limit of
        :func:`limit_for_amplitude` (only here: the open-loop points already hold
        whatever compression the board had)."""
        return replace(super().loop_system(), limit=self.closed_loop_limit_v)

    def loop_response(self, frequency_hz) -> np.ndarray:
        f = np.asarray(frequency_hz, dtype=float)
        return np.asarray(self._steady(np.atleast_1d(f))).reshape(f.shape)
