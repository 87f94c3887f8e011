"""Least-squares sine fits (IEEE Std 1057 / IEEE Std 1241).

The model is ``y[n] = C + sum_h a_h cos(h w n) + b_h sin(h w n)`` with ``t = n / fs``
and ``w = 2 pi f / fs``; harmonics ``h = 2..H`` are extra columns so that they count as
distortion, not as noise. ``a cos + b sin = A cos(w n + theta)`` with
``A = hypot(a, b)`` and ``theta = atan2(-b, a)`` (the phase convention of the project).

- :func:`fit_sine_3p`: frequency known (three-parameter fit, plus harmonic columns).
  Accepts a batch of records of shape ``(..., N)``.
- :func:`fit_sine_4p`: frequency refined by Gauss-Newton with the extra column
  ``t (-a sin + b cos)``, started from an interpolated DFT peak near the nominal
  frequency (the iteration diverges from more than about half a bin off).

The normal equations are built from :mod:`loopwright.dsp.tonesums`: the Gram matrix in
closed form from ``O(sqrt N)`` exponentials, the right-hand side from one pass over the
record, so a 1e6-sample fit costs a few milliseconds.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from loopwright.dsp.tonesums import data_sums, tone_sums
from loopwright.errors import EstimationError

__all__ = ["SineFit", "fit_sine_3p", "fit_sine_4p", "harmonic_count", "seed_frequency",
           "stimulus_harmonics"]

TWO_PI = 2.0 * np.pi


@dataclass(frozen=True)
class SineFit:
    """Result of a sine fit (arrays carry the batch shape of the input).

    Attributes
    ----------
    frequency_hz
        The fitted (4p) or given (3p) fundamental frequency.
    offset_v
        The constant term ``C``.
    cos_v, sin_v
        ``a_h`` and ``b_h`` for ``h = 1..H``, shape ``(..., H)``.
    noise_var_v2
        Residual variance ``RSS / (N - p)`` (noise, harmonics excluded).
    covariance
        ``G^-1``, shape ``(p, p)``: the parameter covariance is ``noise_var_v2 * covariance``
        (columns ``[1, cos w n, sin w n, cos 2wn, sin 2wn, ...]``).
    n_samples
        Record length.
    iterations
        Gauss-Newton iterations of a four-parameter fit (0 for a three-parameter fit).
    """

    frequency_hz: float
    offset_v: NDArray
    cos_v: NDArray
    sin_v: NDArray
    noise_var_v2: NDArray
    covariance: NDArray
    n_samples: int
    iterations: int = 0

    @property
    def amplitudes_v(self) -> NDArray:
        """Amplitude of each harmonic, ``(..., H)``; index 0 is the fundamental."""
        return np.hypot(self.cos_v, self.sin_v)

    @property
    def amplitude_v(self) -> NDArray:
        """Amplitude of the fundamental."""
        return self.amplitudes_v[..., 0]

    @property
    def phase_rad(self) -> NDArray:
        """Phase of the fundamental at t = 0 in ``A cos(w t + theta)``."""
        return np.arctan2(-self.sin_v[..., 0], self.cos_v[..., 0])

    @property
    def phasor(self) -> NDArray:
        """Complex amplitude ``A exp(j theta) = a - j b`` of the fundamental."""
        return self.cos_v[..., 0] - 1j * self.sin_v[..., 0]

    @property
    def thd_pct(self) -> NDArray:
        """Total harmonic distortion of the fitted harmonics, percent of the fundamental."""
        amps = self.amplitudes_v
        return 100.0 * np.sqrt(np.sum(amps[..., 1:] ** 2, axis=-1)) / amps[..., 0]

    @property
    def log_amplitude_phase_var(self) -> tuple[NDArray, NDArray]:
        """Variances of ``ln A`` and of ``theta`` (rad^2) from the residual noise.

        First-order propagation of ``noise_var_v2 * covariance`` through
        ``ln hypot(a, b)`` and ``atan2(-b, a)``; for white noise and a whole number of
        cycles this is ``1 / (N eta)`` with ``eta = A^2 / (2 sigma^2)`` (the
        known-frequency Cramer-Rao bound).
        """
        a = self.cos_v[..., 0]
        b = self.sin_v[..., 0]
        amp2 = a * a + b * b
        c = self.covariance
        caa, cab, cbb = c[1, 1], c[1, 2], c[2, 2]
        var_ln = self.noise_var_v2 * (a * a * caa + 2 * a * b * cab + b * b * cbb) / amp2**2
        var_ph = self.noise_var_v2 * (b * b * caa - 2 * a * b * cab + a * a * cbb) / amp2**2
        return var_ln, var_ph


def harmonic_count(theta: float, n_samples: int, harmonics: int) -> int:
    """How many harmonics (fundamental included) fit below Nyquist with a bin to spare."""
    limit = np.pi - TWO_PI / n_samples
    count = int(np.floor(limit / theta + 1e-12)) if theta > 0 else 1
    # keep at least two samples per fitted parameter
    count = min(count, max(1, harmonics), max(1, (n_samples // 2 - 1) // 2))
    return max(count, 1)


def stimulus_harmonics(frequency_hz: float, sample_rate_hz: float, n_samples: int,
                       harmonics: int) -> tuple[float, int]:
    """The stimulus in radians per sample and how many harmonics of it fit (see
    :func:`harmonic_count`) in a record of ``n_samples``."""
    theta = TWO_PI * frequency_hz / sample_rate_hz
    return theta, harmonic_count(theta, n_samples, harmonics)


def _trig_table(theta: float, n_samples: int, n_harm: int, max_power: int) -> NDArray:
    """``T[p, k + 2H] = sum u^p exp(j k theta n)`` for ``k = -2H..2H``."""
    ks = np.arange(0, 2 * n_harm + 1)
    half = tone_sums(ks * theta, n_samples, max_power)  # (P, 2H+1)
    return np.concatenate([np.conj(half[:, :0:-1]), half], axis=1)


def _gram(table: NDArray, n_harm: int, spec_i: NDArray, spec_j: NDArray) -> NDArray:
    """Inner products of real columns ``u^p cos|sin(h theta n)``.

    ``spec`` rows are ``(p, h, is_sin)``; ``h = 0, is_sin = 0`` is the constant.
    """
    pi, hi, si = (spec_i[:, c][:, None] for c in range(3))
    pj, hj, sj = (spec_j[:, c][None, :] for c in range(3))
    ptot = pi + pj
    t_d = table[ptot, hi - hj + 2 * n_harm]
    t_s = table[ptot, hi + hj + 2 * n_harm]
    cc = 0.5 * (t_d.real + t_s.real)
    ss = 0.5 * (t_d.real - t_s.real)
    sc = 0.5 * (t_s.imag + t_d.imag)  # column i sin, column j cos
    cs = 0.5 * (t_s.imag - t_d.imag)  # column i cos, column j sin
    return np.where(
        si == 1, np.where(sj == 1, ss, sc), np.where(sj == 1, cs, cc)
    )


def _specs(n_harm: int) -> tuple[NDArray, NDArray]:
    """Column specs: linear columns ``[1, cos h, sin h ...]`` and ``u``-weighted ones."""
    lin = [(0, 0, 0)]
    lin_u = []
    for h in range(1, n_harm + 1):
        lin += [(0, h, 0), (0, h, 1)]
        lin_u += [(1, h, 0), (1, h, 1)]
    return np.array(lin), np.array(lin_u)


def _rhs(s: NDArray) -> NDArray:
    """Real right-hand side ``[sum y, sum y cos h, sum y sin h, ...]`` from complex sums.

    ``s[..., 0]`` is the sum at frequency 0, ``s[..., h]`` at ``h theta``.
    """
    out = np.empty((*s.shape[:-1], 2 * s.shape[-1] - 1))
    out[..., 0] = s[..., 0].real
    out[..., 1::2] = s[..., 1:].real
    out[..., 2::2] = -s[..., 1:].imag
    return out


def _solve(gram: NDArray, rhs: NDArray) -> tuple[NDArray, NDArray]:
    """Solve ``gram x = rhs`` (batch rhs ``(..., p)``) with diagonal scaling; also ``gram^-1``."""
    scale = 1.0 / np.sqrt(np.diag(gram))
    scaled = gram * scale[:, None] * scale[None, :]
    inv_scaled = np.linalg.inv(scaled)
    inv = inv_scaled * scale[:, None] * scale[None, :]
    x = rhs @ inv.T
    return x, inv


def _as_records(y: NDArray, name: str = "y") -> NDArray:
    arr = np.asarray(y, dtype=np.float64)
    if arr.ndim < 1 or arr.shape[-1] == 0:
        raise EstimationError(f"{name} is empty: pass a record of samples")
    # a finite sum means no NaN/inf (they propagate); only an overflow needs the full check
    if not np.isfinite(np.sum(arr)) and not np.all(np.isfinite(arr)):
        raise EstimationError(f"{name} contains NaN or inf: remove or re-capture those samples")
    return np.ascontiguousarray(arr)


def _fit_at(y: NDArray, theta: float, n_harm: int, sum_sq: NDArray,
            with_step: bool) -> tuple[NDArray, NDArray, NDArray, float]:
    """Linear fit at ``theta``; with ``with_step`` also the Gauss-Newton frequency step."""
    n_samples = y.shape[-1]
    thetas = theta * np.arange(n_harm + 1)
    s0, s1 = data_sums(y, thetas, with_u=with_step)
    table = _trig_table(theta, n_samples, n_harm, 2 if with_step else 0)
    lin, lin_u = _specs(n_harm)
    g00 = _gram(table, n_harm, lin, lin)
    r0 = _rhs(s0)
    x, inv = _solve(g00, r0)
    rss = sum_sq - np.sum(x * r0, axis=-1)
    step = 0.0
    if with_step:
        h = np.arange(1, n_harm + 1)
        a = x[1::2]
        b = x[2::2]
        t = np.empty(2 * n_harm)
        t[0::2] = h * b  # d/dw of a cos(hwn) + b sin(hwn) = h n (b cos - a sin)
        t[1::2] = -h * a
        g01 = _gram(table, n_harm, lin, lin_u) @ t
        g11 = t @ _gram(table, n_harm, lin_u, lin_u) @ t
        r1 = np.empty(2 * n_harm)
        r1[0::2] = s1[1:].real
        r1[1::2] = -s1[1:].imag
        p = lin.shape[0]
        aug = np.empty((p + 1, p + 1))
        aug[:p, :p] = g00
        aug[:p, p] = g01
        aug[p, :p] = g01
        aug[p, p] = g11
        rhs = np.append(r0, t @ r1)
        xa, _ = _solve(aug, rhs)
        step = float(xa[p])
    return x, inv, rss, step


def _make_fit(x: NDArray, inv: NDArray, rss: NDArray, n_samples: int, frequency_hz: float,
              iterations: int) -> SineFit:
    dof = max(n_samples - inv.shape[0], 1)
    return SineFit(
        frequency_hz=frequency_hz,
        offset_v=x[..., 0],
        cos_v=x[..., 1::2],
        sin_v=x[..., 2::2],
        noise_var_v2=np.maximum(rss, 0.0) / dof,
        covariance=inv,
        n_samples=n_samples,
        iterations=iterations,
    )


def _check_frequency(n_samples: int, sample_rate_hz: float, frequency_hz: float) -> float:
    if not (np.isfinite(sample_rate_hz) and sample_rate_hz > 0):
        raise EstimationError(f"sample_rate_hz must be a positive number, got {sample_rate_hz!r}")
    if not (np.isfinite(frequency_hz) and frequency_hz > 0):
        raise EstimationError(f"frequency_hz must be a positive number, got {frequency_hz!r}")
    theta = TWO_PI * frequency_hz / sample_rate_hz
    if theta >= np.pi - TWO_PI / n_samples:
        raise EstimationError(
            f"frequency {frequency_hz:g} Hz is at or above Nyquist ({sample_rate_hz / 2:g} Hz, "
            "less one bin): sample faster or measure a lower frequency"
        )
    cycles = frequency_hz * n_samples / sample_rate_hz
    if cycles < 2.0:
        raise EstimationError(
            f"the record holds {cycles:.3g} cycles of {frequency_hz:g} Hz; at least 2 are "
            "needed: capture a longer record"
        )
    return theta


def fit_sine_3p(
    y: NDArray, sample_rate_hz: float, frequency_hz: float, harmonics: int = 1
) -> SineFit:
    """Three-parameter least-squares sine fit at a known frequency (IEEE Std 1057).

    Parameters
    ----------
    y
        Samples, shape ``(N,)`` or a batch ``(..., N)``; not modified.
    sample_rate_hz
        Sample rate; sample ``n`` is at ``t = n / sample_rate_hz``.
    frequency_hz
        The known frequency of the fundamental.
    harmonics
        Highest harmonic order fitted as extra columns (1 = fundamental only); orders
        at or within a bin of Nyquist are left out.

    Returns
    -------
    SineFit
    """
    y = _as_records(y)
    n_samples = y.shape[-1]
    theta = _check_frequency(n_samples, sample_rate_hz, frequency_hz)
    n_harm = harmonic_count(theta, n_samples, harmonics)
    sum_sq = np.einsum("...n,...n->...", y, y)
    x, inv, rss, _ = _fit_at(y, theta, n_harm, sum_sq, with_step=False)
    return _make_fit(x, inv, rss, n_samples, float(frequency_hz), 0)


def seed_frequency(
    y: NDArray, sample_rate_hz: float, frequency_hz: float, max_offset_ppm: float = 500.0
) -> float:
    """Interpolated DFT peak near ``frequency_hz`` (Hann window), in Hz.

    The peak is searched within ``max_offset_ppm`` (plus one bin) of the nominal
    frequency on a one-bin grid of the Hann-windowed DTFT, then refined with the Hann
    two-bin ratio ``delta = (2 alpha - 1) / (alpha + 1)`` (Grandke, IEEE Trans. IM
    32(2), 1983 (mem)). Searches up to about 60 bins wide evaluate the DTFT on the grid
    directly (the Hann window as three plain DTFTs one bin apart, ``O(N)`` per pass);
    wider ones take one real FFT of the windowed record.
    """
    y = _as_records(y)
    n_samples = y.shape[-1]
    bin_rad = TWO_PI / n_samples
    theta0 = TWO_PI * frequency_hz / sample_rate_hz
    cycles = theta0 / bin_rad
    span = int(np.ceil(abs(max_offset_ppm) * 1e-6 * cycles)) + 1
    lo = max(0.5 * cycles, 1.0)
    hi = min(1.5 * cycles, n_samples / 2 - 1.0)
    mean = float(np.mean(y))
    if 2 * span + 5 <= 64:
        # one-bin grid, two bins wider each side: one for the window, one for neighbours
        grid = cycles + np.arange(-span - 2, span + 3, dtype=np.float64)
        s, _ = data_sums(y, grid * bin_rad)
        s = s - mean * np.conj(tone_sums(grid * bin_rad, n_samples, 0)[0])
        # Hann window = 0.5 - 0.5 cos(2 pi n / N): three plain DTFTs one bin apart
        mag = np.abs(0.5 * s[1:-1] - 0.25 * s[:-2] - 0.25 * s[2:])  # mag[i] at grid[i + 1]
        centre = grid[1:-1]
        ok = (centre >= lo) & (centre <= hi)
        ok[[0, -1]] = False
        if not ok.any():
            return float(frequency_hz)
        i = int(np.argmax(np.where(ok, mag, -1.0)))
        peak = float(centre[i])
        here, left, right = mag[i], mag[i - 1], mag[i + 1]
    else:
        window = 0.5 - 0.5 * np.cos(bin_rad * np.arange(n_samples))
        spec = np.abs(np.fft.rfft((y - mean) * window))
        k_lo = max(int(np.floor(max(cycles - span, lo))), 1)
        k_hi = min(int(np.ceil(min(cycles + span, hi))), spec.size - 2)
        k = k_lo + int(np.argmax(spec[k_lo : k_hi + 1]))
        peak = float(k)
        here, left, right = spec[k], spec[k - 1], spec[k + 1]
    if here <= 0:
        return float(frequency_hz)
    if right >= left:
        alpha = right / here
        delta = (2 * alpha - 1) / (alpha + 1)
    else:
        alpha = left / here
        delta = -(2 * alpha - 1) / (alpha + 1)
    delta = float(np.clip(delta, -0.5, 0.5))
    return (peak + delta) * sample_rate_hz / n_samples


def fit_sine_4p(
    y: NDArray,
    sample_rate_hz: float,
    frequency_hz: float,
    harmonics: int = 1,
    max_offset_ppm: float = 500.0,
    seed: bool = True,
    max_iterations: int = 20,
) -> SineFit:
    """Four-parameter least-squares sine fit: frequency refined (IEEE Std 1057).

    Parameters
    ----------
    y
        One record, shape ``(N,)``; not modified.
    sample_rate_hz
        Sample rate; ``t = n / sample_rate_hz``.
    frequency_hz
        Nominal frequency. The true one may be ``max_offset_ppm`` away (clock offset
        between generator and scope, a rounded setting).
    harmonics
        Highest harmonic order fitted (their frequencies follow the fundamental).
    max_offset_ppm
        Half-width of the search for the starting DFT peak.
    seed
        Start from the interpolated DFT peak (True) or from ``frequency_hz`` itself.
    max_iterations
        Gauss-Newton iterations at most.

    Returns
    -------
    SineFit
        ``frequency_hz`` is the refined frequency; the other fields are the
        three-parameter fit there.

    Raises
    ------
    EstimationError
        The record is unusable or the iteration left the search range (no tone there).
    """
    y = _as_records(y)
    if y.ndim != 1:
        raise EstimationError("fit_sine_4p takes one record (a 1-D array)")
    n_samples = y.size
    _check_frequency(n_samples, sample_rate_hz, frequency_hz)
    f0 = seed_frequency(y, sample_rate_hz, frequency_hz, max_offset_ppm) if seed else frequency_hz
    bin_rad = TWO_PI / n_samples
    theta = TWO_PI * f0 / sample_rate_hz
    theta_nominal = TWO_PI * frequency_hz / sample_rate_hz
    allowed = bin_rad * (2.0 + abs(max_offset_ppm) * 1e-6 * theta_nominal / bin_rad)
    n_harm = harmonic_count(theta, n_samples, harmonics)
    sum_sq = float(y @ y)
    fit = None
    for iteration in range(1, max_iterations + 1):
        x, inv, rss, step = _fit_at(y, theta, n_harm, sum_sq, with_step=True)
        fit = (x, inv, rss, iteration)
        if not np.isfinite(step):
            break
        if abs(step) <= 1e-11 * bin_rad + 1e-15 * theta:
            break
        theta = theta + float(np.clip(step, -0.25 * bin_rad, 0.25 * bin_rad))
        if abs(theta - theta_nominal) > allowed or not 0 < theta < np.pi:
            raise EstimationError(
                f"no tone found near {frequency_hz:g} Hz (the frequency fit wandered off): "
                "check the stimulus frequency and that the reference channel sees it"
            )
    else:
        x, inv, rss, _ = _fit_at(y, theta, n_harm, sum_sq, with_step=False)
        fit = (x, inv, rss, max_iterations)
    x, inv, rss, iterations = fit
    return _make_fit(x, inv, rss, n_samples, theta * sample_rate_hz / TWO_PI, iterations)
