"""Loop figures from a frequency response: crossovers, margins, Barkhausen points, Q.

The convention (DEVELOPERS.md, "The loop-gain convention"): ``H`` is the round trip
around the loop with every inversion included, so a negative-feedback loop ``L`` is
measured as ``H = -L``. Then

- a gain crossover is where ``|H| = 1``; its phase margin is ``angle(H)`` wrapped to
  (-180, 180] (the same number python-control's ``stability_margins`` gives for ``L``);
- a zero-phase crossing is where ``angle(H) = 0`` (``angle(L) = -180``); its gain
  margin is ``-20 log10 |H|`` and the Barkhausen criterion is met there when
  ``|H| >= 1`` (an oscillation is predicted, with excess gain ``|H|``);
- the worst margins are chosen as python-control chooses them: the phase margin
  smallest in magnitude, the gain margin closest to 0 dB.

Crossings are found by root-finding (``scipy.optimize.brentq``) on the interpolation
model of :mod:`loopwright.analysis.interpolate`, only inside the swept range: a
crossing outside it is not reached (``None``), never extrapolated. Between two
samples the model is searched on a finer grid only when it is a trusted rational fit.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import brentq, minimize_scalar
from scipy.signal import find_peaks

from loopwright.analysis.interpolate import ResponseModel
from loopwright.analysis.response import FrequencyResponse, wrap_deg
from loopwright.errors import InputError

FloatArray = NDArray[np.float64]

#: Grid points per sample interval searched when the model is trusted.
SUBDIVISIONS_TRUSTED = 16
#: A gain peak must stand this many dB (and 6 sigma of the gain) above its
#: surroundings to count as a resonance.
RESONANCE_PROMINENCE_DB = 1.0
#: Largest low-frequency slope (dB/decade) for which a -3 dB bandwidth applies.
FLAT_SLOPE_DB_PER_DECADE = 2.0

_DB_PER_NEPER = 20.0 / np.log(10.0)
#: "-3 dB" is the half-power level, 10 log10(2) = 3.0103 dB below the reference.
HALF_POWER_DB = 10.0 * np.log10(2.0)
_STEP_NEPER = 1e-5


@dataclass(frozen=True)
class GainCrossover:
    """A frequency where ``|H| = 1``.

    Attributes
    ----------
    frequency_hz, phase_margin_deg
        Where, and ``angle(H)`` there wrapped to (-180, 180].
    frequency_hz_std, phase_margin_deg_std
        One-sigma uncertainty from the data's std and the model's error.
    """

    frequency_hz: float
    phase_margin_deg: float
    frequency_hz_std: float
    phase_margin_deg_std: float


@dataclass(frozen=True)
class ZeroPhaseCrossing:
    """A frequency where ``angle(H) = 0``.

    Attributes
    ----------
    frequency_hz, loop_gain, gain_margin_db
        Where, ``|H|`` there, and ``-20 log10 |H|``.
    barkhausen_met
        ``|H| >= 1``: an oscillation is predicted at this frequency.
    excess_gain
        ``|H|`` when the criterion is met, else None.
    frequency_hz_std, loop_gain_std, gain_margin_db_std
        One-sigma uncertainties.
    """

    frequency_hz: float
    loop_gain: float
    gain_margin_db: float
    barkhausen_met: bool
    excess_gain: float | None
    frequency_hz_std: float
    loop_gain_std: float
    gain_margin_db_std: float


@dataclass(frozen=True)
class Resonance:
    """A peak of ``|H|``.

    Attributes
    ----------
    frequency_hz, peak_db
        Where the peak is and its height.
    q
        Quality factor: from the model's pole pair (``q_method = "pole_pair"``) when the
        rational model is trusted, else ``f / (f_high - f_low)`` from the -3 dB points
        (``"3db_width"``); None when neither applies.
    bandwidth_hz
        ``f_high - f_low`` between the -3 dB points around the peak, or None.
    """

    frequency_hz: float
    peak_db: float
    q: float | None
    q_method: str | None
    bandwidth_hz: float | None


@dataclass(frozen=True)
class LoopFigures:
    """Everything :func:`analyze_loop` finds; ``to_dict()`` gives the JSON."""

    sign: int
    points: int
    frequency_range_hz: tuple[float, float]
    interpolation: str
    interpolation_note: str
    uncertainty_source: str
    gain_crossovers: tuple[GainCrossover, ...]
    zero_phase_crossings: tuple[ZeroPhaseCrossing, ...]
    resonances: tuple[Resonance, ...]
    bandwidth_hz: float | None

    @property
    def worst_crossover(self) -> GainCrossover | None:
        """The crossover whose phase margin is smallest in magnitude (python-control)."""
        if not self.gain_crossovers:
            return None
        return min(self.gain_crossovers, key=lambda c: abs(c.phase_margin_deg))

    @property
    def worst_zero_phase(self) -> ZeroPhaseCrossing | None:
        """The zero-phase crossing whose gain margin is closest to 0 dB (python-control)."""
        if not self.zero_phase_crossings:
            return None
        return min(self.zero_phase_crossings, key=lambda c: abs(c.gain_margin_db))

    @property
    def phase_margin_deg(self) -> float | None:
        """Worst phase margin, or None when |H| never crosses 1 in the swept range."""
        worst = self.worst_crossover
        return None if worst is None else worst.phase_margin_deg

    @property
    def gain_margin_db(self) -> float | None:
        """Worst gain margin, or None when angle(H) never crosses 0 in the swept range."""
        worst = self.worst_zero_phase
        return None if worst is None else worst.gain_margin_db

    @property
    def oscillation_predicted(self) -> bool:
        """True when the Barkhausen criterion is met at some zero-phase crossing."""
        return any(c.barkhausen_met for c in self.zero_phase_crossings)

    @property
    def oscillation(self) -> ZeroPhaseCrossing | None:
        """The crossing meeting the criterion with the largest excess gain, or None."""
        met = [c for c in self.zero_phase_crossings if c.barkhausen_met]
        return max(met, key=lambda c: c.loop_gain) if met else None

    def to_dict(self) -> dict[str, Any]:
        """The JSON of ``loopwright analyze --json`` (None becomes null)."""
        pm, gm, osc = self.worst_crossover, self.worst_zero_phase, self.oscillation
        return {
            "sign": self.sign,
            "points": self.points,
            "frequency_range_hz": list(self.frequency_range_hz),
            "interpolation": self.interpolation,
            "interpolation_note": self.interpolation_note,
            "uncertainty_source": self.uncertainty_source,
            "phase_margin_deg": None if pm is None else pm.phase_margin_deg,
            "phase_margin_deg_std": None if pm is None else pm.phase_margin_deg_std,
            "phase_margin_frequency_hz": None if pm is None else pm.frequency_hz,
            "gain_margin_db": None if gm is None else gm.gain_margin_db,
            "gain_margin_db_std": None if gm is None else gm.gain_margin_db_std,
            "gain_margin_frequency_hz": None if gm is None else gm.frequency_hz,
            "oscillation_predicted": self.oscillation_predicted,
            "oscillation_frequency_hz": None if osc is None else osc.frequency_hz,
            "excess_gain": None if osc is None else osc.excess_gain,
            "gain_crossovers": [asdict(c) for c in self.gain_crossovers],
            "zero_phase_crossings": [asdict(c) for c in self.zero_phase_crossings],
            "resonances": [asdict(r) for r in self.resonances],
            "bandwidth_hz": self.bandwidth_hz,
        }


def scatter_std(response: FrequencyResponse) -> tuple[float, float]:
    """Per-point noise of gain (dB) and phase (deg) estimated from the data alone.

    Second differences in log f remove a smooth curve's slope; for white noise of std
    sigma they have std ``sigma sqrt(6)``. The median absolute value (/0.6745) resists
    the few large differences at sharp features; any curvature left makes the estimate
    larger, never smaller.
    """
    x = np.log(response.frequency_hz)
    gain = response.gain_db
    phase = np.rad2deg(np.unwrap(np.angle(response.h)))

    def sigma(values: FloatArray) -> float:
        # Second divided differences scaled to equal spacing (sweeps need not be even).
        h1, h2 = np.diff(x)[:-1], np.diff(x)[1:]
        d1 = np.diff(values)[:-1] / h1
        d2 = np.diff(values)[1:] / h2
        second = (d2 - d1) * (h1 * h2) / (0.5 * (h1 + h2))
        return float(np.median(np.abs(second)) / 0.6745 / np.sqrt(6.0))

    return sigma(gain), sigma(phase)


class _Curve:
    """H on x = ln f through the model, with the data's std interpolated."""

    def __init__(self, response: FrequencyResponse, model: ResponseModel) -> None:
        self.model = model
        self.xs = np.log(response.frequency_hz)
        self.lo, self.hi = float(self.xs[0]), float(self.xs[-1])
        n = response.frequency_hz.size
        zeros = np.zeros(n)
        if response.has_uncertainty:
            self.source = "std columns and model"
            self.gain_db_std = zeros if response.gain_db_std is None else response.gain_db_std
            self.phase_deg_std = (zeros if response.phase_deg_std is None
                                  else response.phase_deg_std)
        elif not model.trusted and n >= 5:
            # No std given and the data are not a clean rational: estimate the scatter.
            self.source = "scatter estimate and model"
            gain_std, phase_std = scatter_std(response)
            self.gain_db_std, self.phase_deg_std = np.full(n, gain_std), np.full(n, phase_std)
        else:
            self.source = "model"
            self.gain_db_std = self.phase_deg_std = zeros
        sub = SUBDIVISIONS_TRUSTED if model.trusted else 1
        t = np.linspace(0.0, 1.0, sub, endpoint=False)
        grid = (self.xs[:-1, None] + np.diff(self.xs)[:, None] * t[None, :]).ravel()
        grid = np.append(grid, self.xs[-1])
        if model.trusted:
            grid = np.union1d(grid, self._near_sharp_poles())
        self.grid = grid
        self.grid_h = self.h(self.grid)

    def _near_sharp_poles(self) -> FloatArray:
        """Extra grid points around the model's lightly damped poles.

        Near a sharp resonance |H| and angle(H) change within a fraction of the -3 dB
        width, so two crossings can sit closer than the regular grid; search there finely.
        """
        poles = self.model.poles_hz
        sharp = poles[(poles.imag > 0) & (np.abs(poles.real) < 0.25 * poles.imag)]
        extra = [
            np.log(p.imag) + np.linspace(-8.0, 8.0, 129) * abs(p.real) / p.imag
            for p in sharp
        ]
        if not extra:
            return np.empty(0)
        points = np.concatenate(extra)
        return points[(points > self.lo) & (points < self.hi)]

    def h(self, x: FloatArray | float) -> NDArray[np.complex128]:
        return self.model(np.exp(np.clip(x, self.lo, self.hi)))

    def log_gain(self, x: float) -> float:
        return float(np.log(np.abs(self.h(x))))

    def sin_phase(self, x: float) -> float:
        value = self.h(x)
        return float(value.imag / np.abs(value))

    def slopes(self, x: float) -> tuple[float, float]:
        """d(gain_db)/dx and d(phase_deg)/dx at x (x = ln f)."""
        a = max(self.lo, x - _STEP_NEPER)
        b = min(self.hi, x + _STEP_NEPER)
        ha, hb = self.h(np.array([a, b]))
        gain = _DB_PER_NEPER * np.log(np.abs(hb) / np.abs(ha)) / (b - a)
        phase = np.rad2deg(np.angle(hb / ha)) / (b - a)
        return float(gain), float(phase)

    def sigmas(self, x: float) -> tuple[float, float]:
        """One-sigma gain (dB) and phase (deg) at x: data std and model error."""
        f = np.exp(x)
        model_g, model_p = self.model.model_error(np.array([f]))
        data_g = np.interp(x, self.xs, self.gain_db_std)
        data_p = np.interp(x, self.xs, self.phase_deg_std)
        return float(np.hypot(data_g, model_g[0])), float(np.hypot(data_p, model_p[0]))

    def roots(self, values: FloatArray, func: Any) -> list[float]:
        """Roots of ``func`` bracketed by sign changes of ``values`` on the grid.

        A value exactly zero counts only inside the range with its neighbours on
        opposite sides; at either end nobody can tell whether the curve crossed.
        """
        found: list[float] = []
        for i in range(values.size - 1):
            if values[i] == 0.0:
                if i > 0 and values[i - 1] * values[i + 1] < 0.0:
                    found.append(float(self.grid[i]))
            elif values[i] * values[i + 1] < 0.0:
                found.append(float(brentq(func, self.grid[i], self.grid[i + 1], xtol=1e-13)))
        return found


def _gain_crossovers(curve: _Curve) -> list[GainCrossover]:
    values = np.log(np.abs(curve.grid_h))
    found = []
    for x in curve.roots(values, curve.log_gain):
        sigma_g, sigma_p = curve.sigmas(x)
        slope_g, slope_p = curve.slopes(x)
        sigma_x = sigma_g / max(abs(slope_g), 1e-12)
        f = float(np.exp(x))
        pm = float(wrap_deg(np.angle(curve.h(x), deg=True)))
        found.append(GainCrossover(
            frequency_hz=f,
            phase_margin_deg=pm,
            frequency_hz_std=f * sigma_x,
            phase_margin_deg_std=float(np.hypot(sigma_p, slope_p * sigma_x)),
        ))
    return found


def _zero_phase_crossings(curve: _Curve) -> list[ZeroPhaseCrossing]:
    values = curve.grid_h.imag / np.abs(curve.grid_h)
    found = []
    for x in curve.roots(values, curve.sin_phase):
        value = complex(curve.h(x))
        if value.real <= 0.0:
            continue  # a 180 deg crossing, not a zero-phase one
        sigma_g, sigma_p = curve.sigmas(x)
        slope_g, slope_p = curve.slopes(x)
        sigma_x = sigma_p / max(abs(slope_p), 1e-12)
        gain = abs(value)
        gm_db = float(-20.0 * np.log10(gain))
        gm_std = float(np.hypot(sigma_g, slope_g * sigma_x))
        met = gain >= 1.0
        found.append(ZeroPhaseCrossing(
            frequency_hz=float(np.exp(x)),
            loop_gain=gain,
            gain_margin_db=gm_db,
            barkhausen_met=met,
            excess_gain=gain if met else None,
            frequency_hz_std=float(np.exp(x) * sigma_x),
            loop_gain_std=gain * gm_std / _DB_PER_NEPER,
            gain_margin_db_std=gm_std,
        ))
    return found


def _level_crossing(curve: _Curve, gain_db: FloatArray, start: int, step: int,
                    level_db: float) -> float | None:
    """First x from grid index ``start`` going ``step`` where gain falls below level."""
    i = start
    while 0 <= i + step < gain_db.size:
        if gain_db[i + step] < level_db <= gain_db[i]:
            a, b = sorted((curve.grid[i], curve.grid[i + step]))
            return float(brentq(lambda x: _DB_PER_NEPER * curve.log_gain(x) - level_db,
                                a, b, xtol=1e-13))
        i += step
    return None


def _pole_pair_q(model: ResponseModel, frequency_hz: float) -> float | None:
    poles = model.poles_hz
    if not model.trusted or poles.size == 0:
        return None
    near = poles[(np.abs(poles) > frequency_hz / 1.5) & (np.abs(poles) < frequency_hz * 1.5)
                 & (poles.real < 0.0)]
    if near.size == 0:
        return None
    pole = near[np.argmin(np.abs(near - 1j * np.sign(near.imag) * frequency_hz))]
    q = abs(pole) / (2.0 * abs(pole.real))
    return float(q) if q > 0.5 else None


def _resonances(curve: _Curve) -> list[Resonance]:
    gain_db = _DB_PER_NEPER * np.log(np.abs(curve.grid_h))
    # Noise must not pass for a resonance: ask for 6 sigma of the gain's scatter too
    # (a peak and a dip of noise, 3 sigma each, are this far apart).
    noise_db = float(np.median(curve.gain_db_std)) if curve.gain_db_std.size else 0.0
    peaks, _ = find_peaks(gain_db, prominence=max(RESONANCE_PROMINENCE_DB, 6.0 * noise_db))
    found = []
    for i in peaks:
        a, b = curve.grid[max(i - 1, 0)], curve.grid[min(i + 1, curve.grid.size - 1)]
        best = minimize_scalar(lambda x: -curve.log_gain(x), bounds=(a, b), method="bounded",
                               options={"xatol": 1e-10})
        x_peak = float(best.x) if -best.fun >= curve.log_gain(curve.grid[i]) else curve.grid[i]
        f_peak = float(np.exp(x_peak))
        peak_db = _DB_PER_NEPER * curve.log_gain(x_peak)
        x_low = _level_crossing(curve, gain_db, int(i), -1, peak_db - HALF_POWER_DB)
        x_high = _level_crossing(curve, gain_db, int(i), 1, peak_db - HALF_POWER_DB)
        width = None
        if x_low is not None and x_high is not None:
            width = float(np.exp(x_high) - np.exp(x_low))
            # half-power points that meet in one float resolve no width (and no Q)
            width = width if width > 0.0 else None
        q = _pole_pair_q(curve.model, f_peak)
        method = "pole_pair" if q is not None else None
        if q is None and width is not None:
            q, method = f_peak / width, "3db_width"
        found.append(Resonance(frequency_hz=f_peak, peak_db=float(peak_db), q=q,
                               q_method=method, bandwidth_hz=width))
    return found


def _bandwidth(curve: _Curve, response: FrequencyResponse) -> float | None:
    """-3 dB frequency below a flat low-frequency gain, when the gain starts flat."""
    gain_db = response.gain_db
    slope = (gain_db[1] - gain_db[0]) / np.log10(response.frequency_hz[1]
                                                 / response.frequency_hz[0])
    if abs(slope) > FLAT_SLOPE_DB_PER_DECADE:
        return None
    grid_db = _DB_PER_NEPER * np.log(np.abs(curve.grid_h))
    x = _level_crossing(curve, grid_db, 0, 1, float(gain_db[0]) - HALF_POWER_DB)
    return None if x is None else float(np.exp(x))


def analyze_loop(response: FrequencyResponse, sign: int = 1) -> LoopFigures:
    """Loop figures of a measured response.

    Parameters
    ----------
    response
        The measured ``H`` (round trip, every inversion included).
    sign
        +1 to analyse ``H`` as given; -1 to analyse ``-H`` (for probing that leaves the
        loop's inversion out).

    Returns
    -------
    LoopFigures
        Every gain crossover and zero-phase crossing inside the swept range, the worst
        margins, the Barkhausen verdict, resonances with Q and the -3 dB bandwidth.

    Raises
    ------
    InputError
        ``sign`` is not +1 or -1.

    Examples
    --------
    >>> import numpy as np
    >>> f = np.logspace(-2, 2, 33) * 1e4
    >>> s = 1j * f / 1e4                                 # time-scaled: w = 1 at 10 kHz
    >>> loop = 2 / (s * (s + 1) * (s + 2))               # negative feedback: H = -L
    >>> figures = analyze_loop(FrequencyResponse(f, -loop))
    >>> round(figures.phase_margin_deg, 3), round(figures.gain_margin_db, 3)
    (32.613, 9.542)
    """
    if sign not in (1, -1):
        raise InputError(f"sign must be 1 or -1, got {sign!r}", field="sign")
    used = response.flipped(sign)
    model = used.model()
    curve = _Curve(used, model)
    return LoopFigures(
        sign=int(sign),  # -1.0 or True arrive too: the JSON and the table print an int
        points=len(used),
        frequency_range_hz=(float(used.frequency_hz[0]), float(used.frequency_hz[-1])),
        interpolation=model.method,
        interpolation_note=model.reason,
        uncertainty_source=curve.source,
        gain_crossovers=tuple(_gain_crossovers(curve)),
        zero_phase_crossings=tuple(_zero_phase_crossings(curve)),
        resonances=tuple(_resonances(curve)),
        bandwidth_hz=_bandwidth(curve, used),
    )
