"""Frequency plans, amplitude profiles, timing and adaptive refinement."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from loopwright.errors import InputError
from loopwright.procedure import (
    RefineSettings,
    SweepStep,
    amplitude_at,
    frequency_plan,
    planned_count,
    record_settings,
    refine_points,
    settle_time_s,
)


def sweep(**keys) -> SweepStep:
    keys.setdefault("amplitude_vpp", 0.1)
    return SweepStep(kind="sweep", **keys)


# ---------------------------------------------------------------------- plans


@pytest.mark.parametrize(("start", "stop", "count"), [(10, 1e5, 41), (3.3, 7.7e4, 17),
                                                      (1, 2, 2)])
def test_log_count_is_geomspace(start, stop, count):
    plan = frequency_plan(sweep(start_hz=start, stop_hz=stop, count=count))
    np.testing.assert_array_equal(plan, np.geomspace(start, stop, count))
    assert planned_count(sweep(start_hz=start, stop_hz=stop, count=count)) == count


@pytest.mark.parametrize(("start_exp", "stop_exp", "ppd"), [(1, 5, 10), (2, 4, 40),
                                                             (0, 6, 7)])
def test_points_per_decade_is_logspace(start_exp, stop_exp, ppd):
    # numpy.logspace over whole decades: 10**(k/ppd) steps from 10**start_exp.
    step = sweep(start_hz=10.0**start_exp, stop_hz=10.0**stop_exp, points_per_decade=ppd)
    plan = frequency_plan(step)
    expected = np.logspace(start_exp, stop_exp, (stop_exp - start_exp) * ppd + 1)
    np.testing.assert_allclose(plan, expected, rtol=1e-13, atol=0)
    assert plan[0] == 10.0**start_exp and plan[-1] == 10.0**stop_exp
    assert planned_count(step) == plan.size


def test_points_per_decade_appends_stop_off_grid():
    step = sweep(start_hz=100, stop_hz=450, points_per_decade=10)
    plan = frequency_plan(step)
    grid = 100 * 10 ** (np.arange(7) / 10)          # 100 ... 398 Hz, next 501 > 450
    np.testing.assert_allclose(plan[:-1], grid, rtol=1e-15)
    assert plan[-1] == 450 and planned_count(step) == 8
    assert np.all(np.diff(plan) > 0)


def test_linear_plans():
    np.testing.assert_array_equal(
        frequency_plan(sweep(spacing="linear", start_hz=1e3, stop_hz=2e3, count=11)),
        np.linspace(1e3, 2e3, 11))
    plan = frequency_plan(sweep(spacing="linear", start_hz=100, stop_hz=1050, step_hz=100))
    np.testing.assert_allclose(plan, [*range(100, 1001, 100), 1050])
    plan = frequency_plan(sweep(spacing="linear", start_hz=100, stop_hz=1000, step_hz=100))
    assert plan.size == 10 and plan[-1] == 1000


def test_explicit_list_sorted():
    plan = frequency_plan(sweep(frequencies_hz=[5e3, 1e3, 2e4, 3e3]))
    np.testing.assert_array_equal(plan, [1e3, 3e3, 5e3, 2e4])


# ---------------------------------------------------------------------- amplitudes


def test_amplitude_profile_interpolates_in_log_f():
    step = sweep(amplitude_vpp=None, start_hz=10, stop_hz=1e5, count=5,
                 amplitude_profile=[{"frequency_hz": 100, "amplitude_vpp": 1.0},
                                    {"frequency_hz": 10_000, "amplitude_vpp": 0.1},
                                    {"frequency_hz": 100_000, "amplitude_vpp": 0.3}])
    assert amplitude_at(step, 1000) == pytest.approx(0.55)       # half-way in log f
    assert amplitude_at(step, 100 * 10**0.25) == pytest.approx(1.0 - 0.9 * 0.125)
    assert amplitude_at(step, 10_000) == pytest.approx(0.1)
    assert amplitude_at(step, math.sqrt(1e4 * 1e5)) == pytest.approx(0.2)
    assert amplitude_at(step, 1.0) == 1.0                        # held below
    assert amplitude_at(step, 1e9) == pytest.approx(0.3)         # held above
    assert amplitude_at(step, 1000, max_amplitude_vpp=0.5) == 0.5  # capped
    assert amplitude_at(sweep(start_hz=1, stop_hz=2, count=2, amplitude_vpp=0.7), 3) == 0.7
    with pytest.raises(InputError):
        amplitude_at(step, 0.0)


# ---------------------------------------------------------------------- timing


def test_settle_time():
    step = sweep(start_hz=1, stop_hz=1e6, count=3, settle_s=0.01, settle_cycles=20)
    assert settle_time_s(step, 100) == pytest.approx(0.2)       # 20 cycles of 100 Hz
    assert settle_time_s(step, 1e5) == pytest.approx(0.01)      # the floor in seconds


def test_record_settings_cycles_and_samples():
    step = sweep(start_hz=1, stop_hz=1e6, count=3, cycles_per_record=10, min_samples=2048)
    rate, length = record_settings(step, 1e3, max_sample_rate_hz=1e9, max_record_length=10**6)
    assert length >= 2048 and length / rate * 1e3 == pytest.approx(10, rel=1e-3)
    # the rate is the limit: the record keeps its cycles at the highest rate
    rate, length = record_settings(step, 1e6, max_sample_rate_hz=1e8, max_record_length=10**6)
    assert rate == 1e8 and length == 1000
    # memory is the limit: the rate drops, the cycles stay
    rate, length = record_settings(step, 1.0, max_sample_rate_hz=1e8, max_record_length=1000)
    assert length == 1000 and rate == pytest.approx(100)
    # a frequency the scope cannot sample is an error, not a silent alias
    with pytest.raises(InputError, match="cannot record"):
        record_settings(step, 5e7, max_sample_rate_hz=1e8, max_record_length=10**6)


# ---------------------------------------------------------------------- refinement


def _loop() -> control.TransferFunction:
    """A type-1 loop with two extra poles (textbook form K / (s (1+s/p1)(1+s/p2)))."""
    s = control.tf("s")
    return 2 * np.pi * 2e3 / (s * (1 + s / (2 * np.pi * 2e4)) * (1 + s / (2 * np.pi * 1e5)))


def _refine_until_done(f, respond, settings):
    added = 0
    for _ in range(200):
        new = refine_points(f, respond(f), settings, already_added=added)
        if new.size == 0:
            break
        assert not np.any(np.isin(new, f)), "a frequency was proposed twice"
        added += new.size
        f = np.sort(np.concatenate([f, new]))
    return f, added


def test_refinement_finds_crossover_of_known_loop():
    loop = _loop()
    # python-control's margins are the reference (H = -L, the project's convention).
    _gm, _pm, w_180, w_c = control.margin(loop)
    crossover_hz, phase_crossover_hz = w_c / (2 * np.pi), w_180 / (2 * np.pi)

    def respond(f):
        return -np.asarray(loop(2j * np.pi * np.asarray(f)), dtype=complex)

    coarse = np.logspace(2, 6, 4 * 4 + 1)            # 4 points per decade
    settings = RefineSettings(max_extra_points=30, max_phase_step_deg=30,
                              max_gain_step_db=20, near_crossings=True,
                              min_relative_spacing=0.005)
    f, added = _refine_until_done(coarse, respond, settings)
    assert 0 < added <= 30
    for target in (crossover_hz, phase_crossover_hz):
        nearest = f[np.argmin(np.abs(np.log(f / target)))]
        assert abs(nearest / target - 1) < 0.005, (target, nearest)
    # a uniform log plan with the same worst-case distance (0.5 %) needs
    # 1 / log10(1.005**2) ~ 231 points per decade, 924 over these 4 decades;
    # here 17 + added (<= 47) points do it.
    assert coarse.size + added < 0.1 * 924


def test_refinement_brackets_resonance_peak():
    f0, q = 12.3e3, 20.0

    def respond(f):
        x = np.asarray(f) / f0
        return 1.0 / (1 - x**2 + 1j * x / q)

    coarse = np.logspace(3, 5, 11)
    settings = RefineSettings(max_extra_points=40, max_phase_step_deg=90,
                              max_gain_step_db=100, near_crossings=True,
                              min_relative_spacing=0.002)
    f, _ = _refine_until_done(coarse, respond, settings)
    peak = f[np.argmax(np.abs(respond(f)))]
    assert abs(peak / f0 - 1) < 0.01
    # the coarse plan's nearest point is far from the peak
    nearest_coarse = coarse[np.argmin(np.abs(np.log(coarse / f0)))]
    assert abs(nearest_coarse / f0 - 1) > 0.1


def test_refinement_respects_cap_and_already_added():
    f = np.logspace(2, 5, 7)
    h = np.exp(-1j * np.pi * f / 2e4) * 1e3 / f        # fast phase, a crossover
    settings = RefineSettings(max_extra_points=3, max_phase_step_deg=1,
                              max_gain_step_db=0.5)
    new = refine_points(f, h, settings, already_added=0)
    assert new.size == 3 and np.all(np.diff(new) > 0)
    assert refine_points(f, h, settings, already_added=2).size == 1
    assert refine_points(f, h, settings, already_added=3).size == 0
    # geometric midpoints of neighbour intervals
    mids = np.sqrt(f[:-1] * f[1:])
    assert np.all(np.min(np.abs(new[:, None] / mids[None, :] - 1), axis=1) < 1e-12)


def test_refinement_quiet_response_adds_nothing():
    f = np.logspace(2, 4, 21)
    h = 10 * np.ones_like(f) * np.exp(-1j * 0.5)     # flat, no crossing
    assert refine_points(f, h, RefineSettings()).size == 0


def test_refinement_does_not_change_inputs_and_accepts_any_order():
    f = np.array([1e4, 1e2, 1e3])
    h = np.array([0.1, 10, 1.0 + 0.0j]) * np.exp(-1j * 2.5)
    f_copy, h_copy = f.copy(), h.copy()
    new = refine_points(f, h, RefineSettings(max_extra_points=10))
    np.testing.assert_array_equal(f, f_copy)
    np.testing.assert_array_equal(h, h_copy)
    assert new.size > 0 and not np.any(np.isin(new, f))


def test_refinement_stops_at_spacing_floor():
    f = np.array([1000.0, 1000.5])                    # 0.05 % apart
    h = np.array([2.0, 0.5], dtype=complex)           # a crossover between them
    assert refine_points(f, h, RefineSettings(min_relative_spacing=0.001)).size == 0
    assert refine_points(f, h, RefineSettings(min_relative_spacing=1e-4)).size == 1


# ---------------------------------------------------------------------- properties

@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(1.0, 1e7), min_size=2, max_size=40, unique=True),
       st.data(), st.integers(0, 12), st.integers(0, 12))
def test_refinement_properties(frequencies, data, cap, already):
    f = np.array(frequencies)
    n = f.size
    gains = np.array(data.draw(st.lists(st.floats(1e-3, 1e3), min_size=n, max_size=n)))
    phases = np.array(data.draw(st.lists(st.floats(-np.pi, np.pi), min_size=n, max_size=n)))
    h = gains * np.exp(1j * phases)
    new = refine_points(f, h, RefineSettings(max_extra_points=cap), already_added=already)
    assert new.size <= max(0, cap - already)
    assert np.all(np.diff(new) > 0)                         # sorted, unique
    assert not np.any(np.isclose(new[:, None], f[None, :], rtol=1e-9, atol=0))
    if new.size:
        assert new.min() > f.min() and new.max() < f.max()  # only between measured points


@settings(max_examples=60, deadline=None)
@given(st.floats(1e-3, 1e6), st.floats(1.0001, 1e4), st.floats(0.5, 200))
def test_log_plan_properties(start, ratio, ppd):
    step = sweep(start_hz=start, stop_hz=start * ratio, points_per_decade=ppd)
    plan = frequency_plan(step)
    assert plan[0] == start and plan[-1] == start * ratio
    assert np.all(np.diff(plan) > 0) and plan.size == planned_count(step)
    # steps never wider than one grid step of 10**(1/ppd)
    assert np.all(plan[1:] / plan[:-1] <= 10 ** (1 / ppd) * (1 + 1e-9))
