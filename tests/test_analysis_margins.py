"""Loop margins against python-control's ``stability_margins`` and published values.

Sources: the table in references.md (Ogata, Modern Control Engineering 5th ed. 7-6;
Astrom & Murray, Feedback Systems 10.3 (mem); confirmed with python-control 0.10.2),
and python-control ``control.stability_margins`` (returnall=True) on each exact
transfer function. python-control works on L; we measure and analyse H = -L. Every
system is time-scaled so that w = 1 rad/s falls at 10 kHz (f = w * 10 kHz).

Each check runs through three input paths: the Python API, a CSV file, and the CLI.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import control  # the reference (test dependency): a missing one fails, never skips
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from loopwright.analysis import FrequencyResponse, analyze_loop
from loopwright.cli import main
from random_loops import random_loop

F_SCALE_HZ = 1e4  # w = 1 rad/s <-> 10 kHz
# Requirement tolerances for 8 points per decade of exact data.
FREQ_RTOL = 3e-3
PM_ATOL_DEG = 0.2
GM_ATOL_DB = 0.05


def _sweep(decades_low: float, decades_high: float, per_decade: int = 8) -> np.ndarray:
    points = round((decades_high - decades_low) * per_decade) + 1
    return np.logspace(decades_low, decades_high, points) * F_SCALE_HZ


def _measured(system, frequency_hz: np.ndarray) -> np.ndarray:
    """H = -L at frequency_hz (negative feedback, every inversion included)."""
    return -np.asarray(system(1j * frequency_hz / F_SCALE_HZ), dtype=complex)


def _reference(system, frequency_hz: np.ndarray) -> dict:
    """python-control's crossings of L inside the swept range (w = 0 entries dropped)."""
    gm, pm, _sm, w_180, w_c, _ws = control.stability_margins(system, returnall=True)
    lo, hi = frequency_hz[0] / F_SCALE_HZ, frequency_hz[-1] / F_SCALE_HZ
    gm, pm = np.atleast_1d(gm), np.atleast_1d(pm)
    w_180, w_c = np.atleast_1d(w_180), np.atleast_1d(w_c)
    in_c = (w_c > 0) & (w_c >= lo) & (w_c <= hi)
    in_180 = (w_180 > 0) & (w_180 >= lo) & (w_180 <= hi)
    order_c = np.argsort(w_c[in_c])
    order_180 = np.argsort(w_180[in_180])
    return {
        "crossover_hz": w_c[in_c][order_c] * F_SCALE_HZ,
        "phase_margin_deg": pm[in_c][order_c],
        "zero_phase_hz": w_180[in_180][order_180] * F_SCALE_HZ,
        "gain_margin_db": 20 * np.log10(gm[in_180][order_180]),
    }


def _check(figures: dict, reference: dict) -> None:
    crossovers = figures["gain_crossovers"]
    assert len(crossovers) == len(reference["crossover_hz"])
    for mine, f_ref, pm_ref in zip(crossovers, reference["crossover_hz"],
                                   reference["phase_margin_deg"], strict=True):
        assert mine["frequency_hz"] == pytest.approx(f_ref, rel=FREQ_RTOL)
        assert mine["phase_margin_deg"] == pytest.approx(pm_ref, abs=PM_ATOL_DEG)
    zeros = figures["zero_phase_crossings"]
    assert len(zeros) == len(reference["zero_phase_hz"])
    for mine, f_ref, gm_ref in zip(zeros, reference["zero_phase_hz"],
                                   reference["gain_margin_db"], strict=True):
        assert mine["frequency_hz"] == pytest.approx(f_ref, rel=FREQ_RTOL)
        assert mine["gain_margin_db"] == pytest.approx(gm_ref, abs=GM_ATOL_DB)
        assert mine["barkhausen_met"] == (gm_ref <= 0)
    # worst margins chosen as python-control chooses them
    if len(reference["phase_margin_deg"]):
        worst = reference["phase_margin_deg"][np.argmin(np.abs(reference["phase_margin_deg"]))]
        assert figures["phase_margin_deg"] == pytest.approx(worst, abs=PM_ATOL_DEG)
    else:
        assert figures["phase_margin_deg"] is None
    if len(reference["gain_margin_db"]):
        worst = reference["gain_margin_db"][np.argmin(np.abs(reference["gain_margin_db"]))]
        assert figures["gain_margin_db"] == pytest.approx(worst, abs=GM_ATOL_DB)
    else:
        assert figures["gain_margin_db"] is None


def _write_csv(path: Path, frequency_hz: np.ndarray, h: np.ndarray) -> Path:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["frequency_hz", "gain_db", "phase_deg"])
        for f, value in zip(frequency_hz, h, strict=True):
            writer.writerow([repr(float(f)), repr(float(20 * np.log10(abs(value)))),
                             repr(float(np.angle(value, deg=True)))])
    return path


def _via(path_kind: str, frequency_hz, h, tmp_path: Path, capsys) -> dict:
    if path_kind == "api":
        return analyze_loop(FrequencyResponse(frequency_hz, h)).to_dict()
    csv_path = _write_csv(tmp_path / "response.csv", frequency_hz, h)
    if path_kind == "csv":
        return analyze_loop(FrequencyResponse.from_csv(csv_path)).to_dict()
    assert main(["analyze", str(csv_path), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


# -- the published table (references.md) --------------------------------------------
# (num, den, GM as a ratio or None for infinite, w_180, PM deg, w_c)
TEXTBOOK = [
    pytest.param([2], [1, 3, 2, 0], 3.0, np.sqrt(2), 32.6131, 0.749368,
                 id="2_over_s(s+1)(s+2)"),
    pytest.param([1], [1, 1, 0], None, None, 51.8273, 0.786151, id="1_over_s(s+1)"),
    pytest.param([25], [1, 10, 10, 10], 3.6, np.sqrt(10), 29.1104, 1.784436,
                 id="25_over_s3+10s2+10s+10"),
    pytest.param([4], [1, 3, 3, 1], 2.0, np.sqrt(3), 27.1416, 1.232819, id="4_over_(s+1)^3"),
]


@pytest.mark.parametrize("path_kind", ["api", "csv", "cli"])
@pytest.mark.parametrize(("num", "den", "gm", "w_180", "pm", "w_c"), TEXTBOOK)
def test_textbook_margins(num, den, gm, w_180, pm, w_c, path_kind, tmp_path, capsys) -> None:
    # Ogata 7-6 / Astrom & Murray 10.3 (mem), values in references.md
    system = control.tf(num, den)
    f = _sweep(-2, 2)
    figures = _via(path_kind, f, _measured(system, f), tmp_path, capsys)
    assert figures["phase_margin_deg"] == pytest.approx(pm, abs=1e-3)
    assert figures["phase_margin_frequency_hz"] == pytest.approx(w_c * F_SCALE_HZ, rel=1e-5)
    if gm is None:
        assert figures["gain_margin_db"] is None
        assert figures["zero_phase_crossings"] == []
    else:
        assert figures["gain_margin_db"] == pytest.approx(20 * np.log10(gm), abs=1e-3)
        assert figures["gain_margin_frequency_hz"] == pytest.approx(w_180 * F_SCALE_HZ,
                                                                     rel=1e-5)
    assert figures["oscillation_predicted"] is False
    _check(figures, _reference(system, f))


@pytest.mark.parametrize(("num", "den", "gm", "w_180", "pm", "w_c"), TEXTBOOK)
def test_second_order_formula(num, den, gm, w_180, pm, w_c) -> None:
    # references.md: wn^2/(s(s + 2 zeta wn)) has
    # PM = atan(2 zeta / sqrt(sqrt(1 + 4 zeta^4) - 2 zeta^2)) (Ogata (mem))
    del num, den, gm, w_180, pm, w_c
    for zeta in (0.1, 0.3, 0.7):
        system = control.tf([1.0], [1.0, 2 * zeta, 0.0])
        f = _sweep(-2, 2)
        figures = analyze_loop(FrequencyResponse(f, _measured(system, f)))
        expected = np.degrees(np.arctan(2 * zeta / np.sqrt(np.sqrt(1 + 4 * zeta**4)
                                                           - 2 * zeta**2)))
        assert figures.phase_margin_deg == pytest.approx(expected, abs=1e-6)


def test_sign_flip_analyses_minus_h(tmp_path, capsys) -> None:
    # A probe that leaves the inversion out records L itself; --sign -1 restores H = -L.
    system = control.tf([2], [1, 3, 2, 0])
    f = _sweep(-2, 2)
    path = _write_csv(tmp_path / "l.csv", f, -_measured(system, f))
    assert main(["analyze", str(path), "--sign", "-1", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["sign"] == -1
    assert figures["phase_margin_deg"] == pytest.approx(32.6131, abs=1e-3)
    assert figures["gain_margin_db"] == pytest.approx(9.5424, abs=1e-3)
    # a float sign from code is kept as the int the JSON and the table show
    from_api = analyze_loop(FrequencyResponse.from_csv(path), sign=-1.0)
    assert from_api.sign == -1 and isinstance(from_api.sign, int)


# -- seeded random loops --------------------------------------------------------------
def _near_edge(system, frequency_hz: np.ndarray) -> bool:
    """True when a crossing lies within 5 % of either end (the count would be moot)."""
    _gm, _pm, _sm, w_180, w_c, _ws = control.stability_margins(system, returnall=True)
    w = np.concatenate([np.atleast_1d(w_180), np.atleast_1d(w_c)]) * F_SCALE_HZ
    lo, hi = frequency_hz[0], frequency_hz[-1]
    return bool(np.any((np.abs(w / lo - 1) < 0.05) | (np.abs(w / hi - 1) < 0.05)))


def _random_loops(count: int, seed: int = 20261201) -> list:
    rng = np.random.default_rng(seed)
    f = _sweep(-3, 3)
    loops = []
    while len(loops) < count:
        system = random_loop(rng)
        if not _near_edge(system, f):
            loops.append(system)
    return loops


RANDOM_LOOPS = _random_loops(24)


@pytest.mark.parametrize("index", range(len(RANDOM_LOOPS)))
def test_random_loops_api(index) -> None:
    # python-control stability_margins(returnall=True) on the exact transfer function
    system = RANDOM_LOOPS[index]
    f = _sweep(-3, 3)  # 8 points per decade, 6 decades
    figures = analyze_loop(FrequencyResponse(f, _measured(system, f)))
    assert figures.interpolation == "aaa"
    _check(figures.to_dict(), _reference(system, f))


@pytest.mark.parametrize("path_kind", ["csv", "cli"])
@pytest.mark.parametrize("index", [0, 5, 11, 17, 23])
def test_random_loops_through_files(index, path_kind, tmp_path, capsys) -> None:
    # python-control stability_margins; CSV written with repr() keeps the data exact
    system = RANDOM_LOOPS[index]
    f = _sweep(-3, 3)
    figures = _via(path_kind, f, _measured(system, f), tmp_path, capsys)
    _check(figures, _reference(system, f))


def test_random_loops_cover_lightly_damped_pairs_and_orders() -> None:
    # The table is only worth its name if it holds what it says.
    orders = [len(s.den[0][0]) - 1 for s in RANDOM_LOOPS]
    damping = [min(np.abs(np.real(p)) / np.abs(p)) for s in RANDOM_LOOPS
               for p in [s.poles()[np.abs(np.imag(s.poles())) > 0]] if p.size]
    assert max(orders) == 6
    assert min(damping) < 0.1
    assert sum(1 for s in RANDOM_LOOPS if len(_reference(s, _sweep(-3, 3))["zero_phase_hz"]))\
        >= 10


def test_crossings_outside_the_range_are_not_reached() -> None:
    # 2/(s(s+1)(s+2)): crossover at 7.49 kHz, zero phase at 14.1 kHz (references.md).
    system = control.tf([2], [1, 3, 2, 0])
    f = np.logspace(np.log10(100.0), np.log10(5e3), 30)  # stops below both
    figures = analyze_loop(FrequencyResponse(f, _measured(system, f)))
    assert figures.gain_crossovers == () and figures.zero_phase_crossings == ()
    assert figures.phase_margin_deg is None and figures.gain_margin_db is None
    assert figures.oscillation_predicted is False
    data = figures.to_dict()
    assert data["phase_margin_deg"] is None and data["gain_margin_db"] is None
    # a sweep that holds the crossover but stops before the zero-phase crossing
    f = np.logspace(np.log10(100.0), np.log10(1.2e4), 30)
    figures = analyze_loop(FrequencyResponse(f, _measured(system, f)))
    assert figures.phase_margin_deg == pytest.approx(32.6131, abs=1e-3)
    assert figures.gain_margin_db is None


def test_a_loop_that_never_crosses() -> None:
    # 0.1/(s+1): |L| < 1 everywhere and angle(L) never reaches -180 deg.
    system = control.tf([0.1], [1, 1])
    f = _sweep(-2, 3)
    figures = analyze_loop(FrequencyResponse(f, _measured(system, f)))
    assert figures.gain_crossovers == () and figures.zero_phase_crossings == ()
    assert figures.phase_margin_deg is None and figures.gain_margin_db is None
    # flat low-frequency gain: the -3 dB bandwidth applies (pole at w = 1 -> 10 kHz)
    assert figures.bandwidth_hz == pytest.approx(F_SCALE_HZ, rel=1e-3)


@settings(max_examples=25, deadline=None)
@given(index=st.integers(0, len(RANDOM_LOOPS) - 1), decades=st.floats(-3.0, 3.0))
def test_figures_follow_a_frequency_scale(index, decades) -> None:
    # Property: time-scaling a loop (f -> k f) scales every crossing by k and leaves the
    # margins as they are (a margin is a property of the Nyquist curve, Ogata 7-6 (mem)).
    system = RANDOM_LOOPS[index]
    f = _sweep(-3, 3)
    base = analyze_loop(FrequencyResponse(f, _measured(system, f)))
    k = 10.0**decades
    scaled = analyze_loop(FrequencyResponse(f * k, _measured(system, f)))
    assert len(scaled.gain_crossovers) == len(base.gain_crossovers)
    for a, b in zip(base.gain_crossovers, scaled.gain_crossovers, strict=True):
        assert b.frequency_hz == pytest.approx(a.frequency_hz * k, rel=1e-6)
        assert b.phase_margin_deg == pytest.approx(a.phase_margin_deg, abs=1e-6)
    for a, b in zip(base.zero_phase_crossings, scaled.zero_phase_crossings, strict=True):
        assert b.frequency_hz == pytest.approx(a.frequency_hz * k, rel=1e-6)
        assert b.gain_margin_db == pytest.approx(a.gain_margin_db, abs=1e-6)


def test_two_crossovers_inside_one_sample_interval() -> None:
    # python-control stability_margins: a sharp pair (zeta 0.0109) whose peak just
    # touches |L| = 1 gives two crossovers 0.7 % apart, both between two samples of an
    # 8-per-decade sweep; the trusted model is searched finely around its sharp poles.
    wn, zeta, pole, gain = 3.6219, 0.010872, 10.467, 0.087486
    system = (control.tf([gain], [1, 0]) * control.tf([wn * wn], [1, 2 * zeta * wn, wn * wn])
              * control.tf([1], [1 / pole, 1]))
    f = _sweep(-3, 3)
    reference = _reference(system, f)
    assert len(reference["crossover_hz"]) == 3
    assert np.diff(reference["crossover_hz"])[-1] / reference["crossover_hz"][-1] < 0.01
    _check(analyze_loop(FrequencyResponse(f, _measured(system, f))).to_dict(), reference)
