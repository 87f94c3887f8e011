"""Frequency plans, amplitude profiles, timing and adaptive refinement.

Pure functions of a validated step (:class:`~loopwright.procedure.schema.SweepStep`
or a calibration from :meth:`Procedure.calibration_plan`) and numbers; no I/O.

Plans
-----
- log, ``count``: ``numpy.geomspace(start_hz, stop_hz, count)``.
- log, ``points_per_decade``: ``start_hz * 10**(k / points_per_decade)`` for every
  k that stays at or below ``stop_hz``, then ``stop_hz`` itself if the grid missed it.
  With a whole number of decades this is ``numpy.logspace``'s grid exactly.
- linear, ``count``: ``numpy.linspace(start_hz, stop_hz, count)``.
- linear, ``step_hz``: ``start_hz + k * step_hz`` up to ``stop_hz``, then ``stop_hz``
  if the grid missed it.
- ``frequencies_hz``: the list, sorted (duplicates were refused by the schema).

Refinement
----------
:func:`refine_points` looks at a measured response and proposes new frequencies at
geometric midpoints of neighbour intervals that need them. The runner measures them,
merges them into the response and calls it again until it returns nothing or the cap
is spent. Being a pure function of the data, it proposes the same points again after
a resume.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from loopwright.errors import InputError

#: Relative tolerance under which two frequencies count as the same point.
SAME_FREQUENCY_RTOL = 1e-9
#: Fewest samples per cycle a record is planned with (leaves room for harmonics up to
#: the 9th for the THD figure; Nyquist alone would need > 2).
MIN_SAMPLES_PER_CYCLE = 20
#: Fewest samples per cycle accepted when the scope's rate is the limit.
FLOOR_SAMPLES_PER_CYCLE = 2.5
#: Fewest cycles accepted when the scope's record length is the limit.
FLOOR_CYCLES = 2.0


def log_grid_count(start_hz: float, stop_hz: float, points_per_decade: float) -> int:
    """Points of the log grid ``start_hz * 10**(k/ppd) <= stop_hz`` (stop not added)."""
    decades = math.log10(stop_hz / start_hz)
    return math.floor(points_per_decade * decades + 1e-9) + 1


def _with_stop(grid: np.ndarray, stop_hz: float) -> np.ndarray:
    if grid.size and math.isclose(float(grid[-1]), stop_hz, rel_tol=SAME_FREQUENCY_RTOL):
        out = grid.copy()
        out[-1] = stop_hz
        return out
    return np.append(grid[grid < stop_hz], stop_hz)


def frequency_plan(step) -> np.ndarray:
    """The planned frequencies of a sweep or calibration step, sorted and unique.

    Parameters
    ----------
    step
        A validated ``SweepStep`` or ``CalibrateStep`` with a plan of its own (use
        ``Procedure.calibration_plan(index)`` for a calibration that borrows one).

    Returns
    -------
    numpy.ndarray
        Frequencies in Hz, ascending, no repeats.

    Raises
    ------
    InputError
        The step has no frequency plan.
    """
    if step.frequencies_hz is not None:
        return np.unique(np.asarray(step.frequencies_hz, dtype=float))
    start, stop = step.start_hz, step.stop_hz
    if start is None or stop is None:
        raise InputError("this step has no frequency plan (start_hz/stop_hz or frequencies_hz)")
    if step.spacing == "log":
        if step.count is not None:
            return np.unique(np.geomspace(start, stop, step.count))
        count = log_grid_count(start, stop, step.points_per_decade)
        grid = start * 10.0 ** (np.arange(count) / step.points_per_decade)
        return np.unique(_with_stop(grid, stop))
    if step.count is not None:
        return np.unique(np.linspace(start, stop, step.count))
    count = math.floor((stop - start) / step.step_hz + 1e-9) + 1
    grid = start + np.arange(count) * step.step_hz
    return np.unique(_with_stop(grid, stop))


def planned_count(step) -> int:
    """Number of planned points without building the plan (for the size bound)."""
    if step.frequencies_hz is not None:
        return len(set(step.frequencies_hz))
    start, stop = step.start_hz, step.stop_hz
    if start is None or stop is None:
        return 0
    if step.count is not None:
        return step.count
    if step.spacing == "log" and step.points_per_decade is not None:
        count = log_grid_count(start, stop, step.points_per_decade)
        last = start * 10.0 ** ((count - 1) / step.points_per_decade)
    elif step.step_hz is not None:
        count = math.floor((stop - start) / step.step_hz + 1e-9) + 1
        last = start + (count - 1) * step.step_hz
    else:
        return 0
    return count + (0 if math.isclose(last, stop, rel_tol=SAME_FREQUENCY_RTOL) else 1)


def amplitude_at(step, frequency_hz: float, max_amplitude_vpp: float | None = None) -> float:
    """Generator amplitude (Vpp) for one frequency.

    A constant ``amplitude_vpp``, or the ``amplitude_profile`` interpolated linearly
    in log10(frequency) between its corners and held at the end values outside them.

    Parameters
    ----------
    step
        A validated sweep or (resolved) calibration step.
    frequency_hz
        Where the amplitude is wanted (> 0).
    max_amplitude_vpp
        Optional cap (the bench's); the result never exceeds it.

    Raises
    ------
    InputError
        The step has no amplitude, or the frequency is not positive and finite.
    """
    if not (math.isfinite(frequency_hz) and frequency_hz > 0):
        raise InputError(f"frequency must be positive and finite (got {frequency_hz!r})")
    if step.amplitude_profile is not None:
        corners_hz = np.array([p.frequency_hz for p in step.amplitude_profile])
        corners_vpp = np.array([p.amplitude_vpp for p in step.amplitude_profile])
        value = float(np.interp(math.log10(frequency_hz), np.log10(corners_hz), corners_vpp))
    elif step.amplitude_vpp is not None:
        value = float(step.amplitude_vpp)
    else:
        raise InputError("this step has no amplitude_vpp or amplitude_profile")
    if max_amplitude_vpp is not None:
        value = min(value, float(max_amplitude_vpp))
    return value


def settle_time_s(step, frequency_hz: float) -> float:
    """Wait after a frequency change: the larger of ``settle_s`` and ``settle_cycles / f``."""
    if not (math.isfinite(frequency_hz) and frequency_hz > 0):
        raise InputError(f"frequency must be positive and finite (got {frequency_hz!r})")
    return max(float(step.settle_s), float(step.settle_cycles) / frequency_hz)


class RecordSettings(NamedTuple):
    """Sample rate and length asked of the scope for one point."""

    sample_rate_hz: float
    record_length: int


def record_settings(step, frequency_hz: float, max_sample_rate_hz: float,
                    max_record_length: int) -> RecordSettings:
    """Sample rate and record length for ``cycles_per_record`` cycles and ``min_samples``.

    The record spans ``cycles_per_record`` cycles of ``frequency_hz`` with at least
    ``min_samples`` samples and at least :data:`MIN_SAMPLES_PER_CYCLE` samples per cycle.
    Where the scope's rate is the limit the record gets longer in samples at that rate;
    where its memory is the limit the rate drops (keeping the cycles), and only below
    :data:`FLOOR_SAMPLES_PER_CYCLE` samples per cycle are cycles given up, down to
    :data:`FLOOR_CYCLES`.

    Raises
    ------
    InputError
        The scope cannot hold :data:`FLOOR_CYCLES` cycles at
        :data:`FLOOR_SAMPLES_PER_CYCLE` samples per cycle at this frequency.
    """
    f = float(frequency_hz)
    if not (math.isfinite(f) and f > 0):
        raise InputError(f"frequency must be positive and finite (got {frequency_hz!r})")
    if not (max_sample_rate_hz > 0 and max_record_length >= 2):
        raise InputError("the scope's maximum sample rate and record length must be positive")
    cycles = float(step.cycles_per_record)
    duration_s = cycles / f
    rate = max(step.min_samples / duration_s, MIN_SAMPLES_PER_CYCLE * f)
    rate = min(rate, float(max_sample_rate_hz))
    length = math.ceil(rate * duration_s - 1e-9)
    if length > max_record_length:
        # Memory is the limit: keep the cycles at a lower rate while the rate allows.
        length = int(max_record_length)
        rate = length / duration_s
        if rate < FLOOR_SAMPLES_PER_CYCLE * f:
            rate = min(FLOOR_SAMPLES_PER_CYCLE * f, float(max_sample_rate_hz))
    if rate < FLOOR_SAMPLES_PER_CYCLE * f or length / rate * f < FLOOR_CYCLES - 1e-9:
        raise InputError(
            f"the scope cannot record {FLOOR_CYCLES:g} cycles of {f:g} Hz with"
            f" {FLOOR_SAMPLES_PER_CYCLE:g} samples per cycle (rate <= {max_sample_rate_hz:g}"
            f" Sa/s, length <= {max_record_length}); lower stop_hz")
    return RecordSettings(float(rate), int(length))


# --------------------------------------------------------------------------- refinement


def _interval_scores(frequency_hz: np.ndarray, h: np.ndarray, settings) -> np.ndarray:
    """Priority of each neighbour interval (0 = leave alone; crossings score highest)."""
    f = frequency_hz
    magnitude = np.abs(h)
    usable = np.isfinite(h) & (magnitude > 0)
    ok = usable[:-1] & usable[1:]
    with np.errstate(divide="ignore", invalid="ignore"):
        gain_db = 20.0 * np.log10(np.where(usable, magnitude, 1.0))
        ratio = np.where(ok, h[1:] / np.where(usable[:-1], h[:-1], 1.0), 1.0)
    phase_step = np.abs(np.degrees(np.angle(ratio)))
    gain_step = np.abs(np.diff(gain_db))
    scores = np.maximum(phase_step / settings.max_phase_step_deg,
                        gain_step / settings.max_gain_step_db)
    scores = np.where(scores > 1.0, scores, 0.0)
    if settings.near_crossings:
        crossing = np.zeros(f.size - 1, dtype=bool)
        # |H| through 1 (a gain crossover).
        crossing |= np.sign(gain_db[:-1]) * np.sign(gain_db[1:]) < 0
        crossing |= (gain_db[:-1] == 0) ^ (gain_db[1:] == 0)
        # angle(H) through 0 deg: Im(H) changes sign on the right half plane.
        imag, real = h.imag, h.real
        crossing |= (np.sign(imag[:-1]) * np.sign(imag[1:]) < 0) & (real[:-1] + real[1:] > 0)
        # A resonance: a local maximum of |H| brackets both neighbour intervals.
        if f.size >= 3:
            peak = (magnitude[1:-1] > magnitude[:-2]) & (magnitude[1:-1] > magnitude[2:])
            peak &= usable[1:-1] & usable[:-2] & usable[2:]
            crossing[:-1] |= peak
            crossing[1:] |= peak
        scores = np.where(crossing & ok, 1e6 + scores, scores)
    scores = np.where(ok, scores, 0.0)
    too_close = f[1:] / f[:-1] - 1.0 < settings.min_relative_spacing
    return np.where(too_close, 0.0, scores)


def refine_points(frequency_hz, h, settings, already_added: int = 0) -> np.ndarray:
    """New frequencies where a measured response needs more points.

    An interval between neighbours gets its geometric midpoint when the phase or the
    gain changes across it by more than ``max_phase_step_deg`` / ``max_gain_step_db``,
    and, with ``near_crossings``, when it brackets a gain crossover (|H| through 1), a
    0 deg crossing (Im H changes sign with Re H > 0) or sits beside a resonance peak
    (a local maximum of |H|). Intervals narrower than ``min_relative_spacing`` (as a
    ratio) are left alone, so repeated calls converge. Crossings come first, then the
    fastest changes.

    Parameters
    ----------
    frequency_hz, h
        The measured points (any order; non-finite or zero H is skipped).
    settings
        A ``RefineSettings`` (``max_extra_points``, ``max_phase_step_deg``,
        ``max_gain_step_db``, ``near_crossings``, ``min_relative_spacing``).
    already_added
        Points refinement added to this sweep before; the result holds at most
        ``max_extra_points - already_added`` frequencies.

    Returns
    -------
    numpy.ndarray
        New frequencies in Hz, ascending, none equal to a measured one.
    """
    f = np.asarray(frequency_hz, dtype=float)
    values = np.asarray(h, dtype=complex)
    if f.shape != values.shape or f.ndim != 1:
        raise InputError("frequency_hz and h must be 1-D arrays of the same length")
    budget = int(settings.max_extra_points) - int(already_added)
    keep = np.isfinite(f) & (f > 0)
    f, values = f[keep], values[keep]
    if budget <= 0 or f.size < 2:
        return np.empty(0)
    order = np.argsort(f, kind="stable")
    f, values = f[order], values[order]
    distinct = np.concatenate(([True], f[1:] / f[:-1] - 1.0 > SAME_FREQUENCY_RTOL))
    f, values = f[distinct], values[distinct]
    if f.size < 2:
        return np.empty(0)
    scores = _interval_scores(f, values, settings)
    chosen = np.flatnonzero(scores > 0)
    if chosen.size == 0:
        return np.empty(0)
    chosen = chosen[np.argsort(-scores[chosen], kind="stable")][:budget]
    midpoints = np.sqrt(f[chosen] * f[chosen + 1])
    # Never repeat a measured frequency (cannot happen above the spacing floor, but a
    # midpoint is checked rather than trusted).
    position = np.searchsorted(f, midpoints)
    near = np.zeros(midpoints.size, dtype=bool)
    for offset in (-1, 0):
        index = np.clip(position + offset, 0, f.size - 1)
        near |= np.abs(f[index] / midpoints - 1.0) <= SAME_FREQUENCY_RTOL
    return np.unique(midpoints[~near])
