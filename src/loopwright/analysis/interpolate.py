"""Model-based interpolation of a frequency response between its measured points.

A loop gain is a rational function of ``s = j 2 pi f`` (or close to one), so a rational
fit by the AAA algorithm (Nakatsukasa, Sete & Trefethen, "The AAA algorithm for
rational approximation", SIAM J. Sci. Comput. 40(3), 2018; ``scipy.interpolate.AAA``)
reproduces it between sparse points far better than splines in log f. The fit is
trusted only when it predicts points it was not given (a held-out check) and has no
pole that the data do not support (a Froissart doublet). Otherwise, and for noisy
data, the model falls back to shape-preserving cubics (PCHIP) in log f on gain in dB
and unwrapped phase, which never invent wiggles between points.

Every model reports its own error estimate (``model_error``), which the loop figures
add to the data's uncertainty.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.interpolate import AAA, PchipInterpolator

FloatArray = NDArray[np.float64]
ComplexArray = NDArray[np.complex128]

#: Largest relative error at held-out points for the rational fit to be trusted
#: (1e-3 is 0.0087 dB and 0.057 deg).
HELD_OUT_TOLERANCE = 1e-3
#: A rational fit that misses held-out points by more than HELD_OUT_TOLERANCE is still
#: kept when it misses by at most this and predicts them at least RATIONAL_ADVANTAGE
#: times better than PCHIP does (sparse sweeps of sharp resonances); its held-out
#: error then becomes the model error reported with every figure.
HELD_OUT_LOOSE = 2e-2
RATIONAL_ADVANTAGE = 4.0
#: Points given to the held-out fit of a long sweep (the rest are predicted).
HELD_OUT_FIT_POINTS = 160
#: Fewer points than this cannot validate a rational fit; PCHIP is used.
MIN_POINTS_FOR_RATIONAL = 8
#: Most terms of the rational fit: a measured loop of higher order than this is
#: treated as not rational (noise would otherwise be fitted at great cost).
MAX_RATIONAL_TERMS = 30
#: A pole whose pull at the nearest point is below this fraction of |H| there is not
#: supported by the data (a Froissart doublet).
DOUBLET_TOLERANCE = 1e-6

_DB_PER_NEPER = 20.0 / np.log(10.0)


@dataclass(frozen=True)
class ResponseModel:
    """H(f) between the measured points, by a rational (AAA) or a PCHIP model.

    Attributes
    ----------
    method
        ``"aaa"`` or ``"pchip"``.
    reason
        Why this method was chosen (for the report).
    held_out_error
        Largest relative error of the rational fit at held-out points (NaN if not run).
    poles_hz
        Poles of the rational model as ``s / (2 pi)`` in Hz (a pole pair of natural
        frequency f0 and quality factor Q sits at ``|p| = f0``,
        ``Q = |p| / (2 |Re p|)``); empty for PCHIP.
    """

    method: str
    reason: str
    frequency_hz: FloatArray
    h: ComplexArray
    held_out_error: float
    poles_hz: ComplexArray = field(default_factory=lambda: np.empty(0, complex))
    _rational: AAA | None = None
    _f_ref_hz: float = 1.0
    _slopes: tuple[int, int] = (0, 0)
    _gain_db: PchipInterpolator | None = None
    _phase_rad: PchipInterpolator | None = None

    @property
    def trusted(self) -> bool:
        """True when the rational model passed its checks (crossings between points
        that the samples alone do not show are then believed)."""
        return self.method == "aaa"

    def __call__(self, frequency_hz: ArrayLike) -> ComplexArray:
        """Complex H at ``frequency_hz`` (inside the swept range)."""
        f = np.asarray(frequency_hz, dtype=np.float64)
        if self._rational is not None:
            z = 1j * f / self._f_ref_hz
            flat = np.asarray(self._rational(z), dtype=np.complex128)
            return flat / _flattening(z, *self._slopes)
        x = np.log(f)
        assert self._gain_db is not None and self._phase_rad is not None
        return 10.0 ** (self._gain_db(x) / 20.0) * np.exp(1j * self._phase_rad(x))

    def model_error(self, frequency_hz: ArrayLike) -> tuple[FloatArray, FloatArray]:
        """Estimated model error (one sigma) of gain in dB and phase in deg.

        For the rational model, the held-out error; for PCHIP, the difference between
        PCHIP and straight lines in log f (the spread of two honest interpolants).
        """
        f = np.asarray(frequency_hz, dtype=np.float64)
        if self.trusted:
            e = np.full(f.shape, self.held_out_error)
            return e * _DB_PER_NEPER, np.rad2deg(e)
        x = np.log(f)
        xs = np.log(self.frequency_hz)
        gain_db = _DB_PER_NEPER * np.log(np.abs(self.h))
        phase = np.unwrap(np.angle(self.h))
        assert self._gain_db is not None and self._phase_rad is not None
        dg = np.abs(self._gain_db(x) - np.interp(x, xs, gain_db))
        dp = np.abs(self._phase_rad(x) - np.interp(x, xs, phase))
        return dg, np.rad2deg(dp)


def _end_slopes(f: FloatArray, h: ComplexArray) -> tuple[int, int]:
    """Integer slopes (gain ~ f**n) of |h| at the low and the high end."""
    x, g = np.log(f), np.log(np.abs(h))
    low = (g[1] - g[0]) / (x[1] - x[0])
    high = (g[-1] - g[-2]) / (x[-1] - x[-2])
    return int(np.clip(np.round(low), -8, 8)), int(np.clip(np.round(high), -8, 8))


def _flattening(z: ComplexArray, low: int, high: int) -> ComplexArray:
    """A rational weight ``z**-low (1 + z)**(low - high)`` that takes the end slopes out.

    The fit's absolute tolerance would otherwise ignore the small end of a response
    spanning many decades of gain; multiplying by a rational keeps the data rational.
    """
    return z ** (-low) * (1.0 + z) ** (low - high)


def _fit_rational(z: ComplexArray, h: ComplexArray) -> AAA:
    with warnings.catch_warnings():
        # Not reaching the tolerance is judged by the held-out check, not by a warning.
        warnings.simplefilter("ignore", RuntimeWarning)
        return AAA(z, h, max_terms=max(2, min(z.size // 2, MAX_RATIONAL_TERMS)))


def _spurious_poles(fit: AAA, z: ComplexArray, h: ComplexArray) -> int:
    """Number of poles near the data whose pull on the nearest point is negligible.

    Such a pole (with its nearby zero, a Froissart doublet) can put a spike between
    two samples that no sample shows. One farther from the data than the local point
    spacing acts between the samples as it acts on them: harmless, so not counted.
    """
    poles = fit.poles()
    if poles.size == 0:
        return 0
    residues = fit.residues()
    distance = np.abs(poles[:, None] - z[None, :])
    nearest = np.argmin(distance, axis=1)
    closest = distance[np.arange(poles.size), nearest]
    gaps = np.abs(np.diff(z))
    spacing = np.maximum(gaps[np.clip(nearest - 1, 0, gaps.size - 1)],
                         gaps[np.clip(nearest, 0, gaps.size - 1)])
    weak = np.abs(residues) / closest < DOUBLET_TOLERANCE * np.abs(h[nearest])
    return int(np.count_nonzero(weak & (closest < spacing)))


def _pchip_held_out_error(f: FloatArray, h: ComplexArray, keep: NDArray[np.bool_]) -> float:
    """Largest relative error of PCHIP (fitted on ``keep``) at the held-out points."""
    model = _pchip(f[keep], h[keep], "held-out check", float("nan"))
    predicted = model(f[~keep])
    error = float(np.max(np.abs(predicted - h[~keep]) / np.abs(h[~keep])))
    return error if np.isfinite(error) else float("inf")


def _pchip(frequency_hz: FloatArray, h: ComplexArray, reason: str,
           held_out_error: float) -> ResponseModel:
    x = np.log(frequency_hz)
    return ResponseModel(
        method="pchip",
        reason=reason,
        frequency_hz=frequency_hz,
        h=h,
        held_out_error=held_out_error,
        _gain_db=PchipInterpolator(x, _DB_PER_NEPER * np.log(np.abs(h))),
        _phase_rad=PchipInterpolator(x, np.unwrap(np.angle(h))),
    )


def build_model(frequency_hz: ArrayLike, h: ArrayLike) -> ResponseModel:
    """Choose and build the interpolation model of a response.

    Parameters
    ----------
    frequency_hz
        Strictly increasing positive frequencies (validated by the caller).
    h
        Complex gain at each frequency.

    Returns
    -------
    ResponseModel
        A rational AAA model when it predicts held-out points within
        :data:`HELD_OUT_TOLERANCE` (or within :data:`HELD_OUT_LOOSE` and
        :data:`RATIONAL_ADVANTAGE` times better than PCHIP) and has no spurious pole;
        otherwise PCHIP in log f.
    """
    f = np.array(frequency_hz, dtype=np.float64)
    gain = np.array(h, dtype=np.complex128)
    if f.size < MIN_POINTS_FOR_RATIONAL:
        return _pchip(f, gain, f"{f.size} points are too few to validate a rational fit",
                      float("nan"))
    f_ref = float(np.sqrt(f[0] * f[-1]))
    z = 1j * f / f_ref
    low, high = _end_slopes(f, gain)
    weight = _flattening(z, low, high)
    flat = gain * weight
    # Held-out check: fit without every third point (ends kept), predict them. Long
    # sweeps are thinned to HELD_OUT_FIT_POINTS for this fit to bound its cost.
    keep = np.zeros(f.size, dtype=bool)
    if f.size > 1.5 * HELD_OUT_FIT_POINTS:
        keep[np.round(np.linspace(0, f.size - 1, HELD_OUT_FIT_POINTS)).astype(int)] = True
    else:
        keep[:] = True
        keep[1:-1:3] = False
    try:
        partial = _fit_rational(z[keep], flat[keep])
        predicted = partial(z[~keep]) / weight[~keep]
        held_out = float(np.max(np.abs(predicted - gain[~keep]) / np.abs(gain[~keep])))
        if not np.isfinite(held_out):
            held_out = float("inf")
        if held_out > HELD_OUT_TOLERANCE:
            pchip_error = _pchip_held_out_error(f, gain, keep)
            if not (held_out <= HELD_OUT_LOOSE
                    and held_out * RATIONAL_ADVANTAGE <= pchip_error):
                return _pchip(
                    f, gain,
                    f"rational fit missed held-out points by {held_out:.2g} (relative,"
                    f" PCHIP {pchip_error:.2g}): noisy or not rational",
                    held_out,
                )
        full = _fit_rational(z, flat)
    except (np.linalg.LinAlgError, ValueError, ZeroDivisionError) as exc:
        return _pchip(f, gain, f"rational fit failed ({exc})", float("nan"))
    spurious = _spurious_poles(full, z, flat)
    if spurious:
        return _pchip(f, gain, f"rational fit has {spurious} unsupported pole(s)", held_out)
    return ResponseModel(
        method="aaa",
        reason=f"rational fit with {full.support_points.size} terms; held-out error "
        f"{held_out:.2g}",
        frequency_hz=f,
        h=gain,
        held_out_error=held_out,
        poles_hz=np.asarray(full.poles(), dtype=np.complex128) * f_ref,
        _rational=full,
        _f_ref_hz=f_ref,
        _slopes=(low, high),
    )
