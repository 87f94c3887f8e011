"""Capability and population statistics against textbook formulas and numpy.

Cpk = min(Cpu, Cpl), Cpu = (USL - mean)/(3 s), Cpl = (mean - LSL)/(3 s), one side
alone when only one limit is given (Montgomery, Introduction to Statistical Quality
Control, process capability chapter (mem)).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from loopwright.errors import InputError
from loopwright.production.stats import (
    FigureStats,
    capability,
    figure_stats,
    population_stats,
    render_histogram,
    write_histogram_png,
)


def test_hand_worked_two_sided_example() -> None:
    # values 1..5: mean 3, s = sqrt(2.5) = 1.5811; LSL 0, USL 9:
    # Cpu = 6 / 4.7434 = 1.2649, Cpl = 3 / 4.7434 = 0.6325, Cpk = 0.6325 (by hand)
    got = figure_stats("x", [1, 2, 3, 4, 5], limit_min=0.0, limit_max=9.0)
    assert got.mean == 3.0
    assert got.std == pytest.approx(math.sqrt(2.5), rel=1e-15)
    assert got.cpu == pytest.approx(1.2649, abs=1e-4)
    assert got.cpl == pytest.approx(0.6325, abs=1e-4)
    assert got.cpk == got.cpl
    assert (got.min, got.max, got.count, got.missing) == (1.0, 5.0, 5, 0)


def test_centred_process_six_sigma_wide_has_cpk_one() -> None:
    # A centred process whose limits sit at mean +- 3 sigma has Cp = Cpk = 1 (practice).
    cpu, cpl, cpk = capability(10.0, 2.0, 4.0, 16.0)
    assert (cpu, cpl, cpk) == (1.0, 1.0, 1.0)


def test_one_sided_cpk_and_its_fraction_outside() -> None:
    # One-sided Cpk = 1 puts the limit 3 sigma from the mean: a normal process
    # leaves Phi(-3) = 0.135 % beyond it (Montgomery (mem); scipy for Phi).
    cpu, cpl, cpk = capability(50.0, 5.0, 35.0, None)
    assert cpu is None and cpl == pytest.approx(1.0) and cpk == cpl
    assert sps.norm.cdf(-3 * cpk) == pytest.approx(0.00135, abs=1e-5)
    cpu, cpl, cpk = capability(50.0, 5.0, None, 57.5)
    assert cpl is None and cpk == pytest.approx(0.5)


@pytest.mark.parametrize(
    ("values", "reason"),
    [([3.0], "one value"), ([2.0, 2.0, 2.0], "no spread")],
)
def test_undefined_capability_is_none(values: list[float], reason: str) -> None:
    got = figure_stats("x", values, limit_min=0.0, limit_max=5.0)
    assert got.cpk is None, reason
    assert got.mean == pytest.approx(np.mean(values))


def test_missing_values_are_counted_apart() -> None:
    got = figure_stats("x", [1.0, None, 3.0, float("nan")], limit_min=None, limit_max=None)
    assert (got.count, got.missing, got.mean, got.cpk) == (2, 2, 2.0, None)


def test_population_groups_by_figure_and_limits_against_pandas() -> None:
    rng = np.random.default_rng(11)
    values = rng.normal(60.0, 4.0, 40)
    rows = [
        {"run_id": f"r{i}", "figure": "pm", "limit_name": "pm", "value": v, "limit_min": 45.0,
         "limit_max": None, "unit": "deg", "passed": v >= 45.0, "retest": False}
        for i, v in enumerate(values)
    ]
    # same figure under other limits (another procedure version): its own group
    rows += [
        {"run_id": f"q{i}", "figure": "pm", "limit_name": "pm", "value": 70.0 + i,
         "limit_min": 50.0, "limit_max": None, "unit": "deg", "passed": True,
         "retest": False}
        for i in range(3)
    ]
    groups = population_stats(pd.DataFrame(rows))
    assert [(g.figure, g.limit_min, g.count) for g in groups] == [
        ("pm", 45.0, 40), ("pm", 50.0, 3)
    ]
    series = pd.Series(values)
    g = groups[0]
    assert g.mean == pytest.approx(series.mean(), rel=1e-12)
    assert g.std == pytest.approx(series.std(), rel=1e-12)
    assert g.cpk == pytest.approx((series.mean() - 45.0) / (3 * series.std()), rel=1e-12)


def test_terminal_histogram_counts_and_marks() -> None:
    values = np.array([1.0, 1.1, 1.2, 2.0, 2.1, 3.9])
    st = FigureStats("x", None, 0.5, 3.0, 6, 0, 1, *([None] * 7))
    lines = render_histogram(values, st, bins=6)
    counts = [int(line.split()[3]) for line in lines]
    edges = np.linspace(0.5 - 0.068, 3.9 + 0.068, 7)
    assert counts == np.histogram(values, bins=edges)[0].tolist()
    # edges 0.432 ... 3.968 in steps of 0.589: LSL in the first bin, USL in the fifth,
    # the sixth lies wholly above USL
    assert "LSL" in lines[0] and "USL" in lines[4] and lines[5].endswith("out")
    assert "[red]" in lines[5] and not any(line.endswith("out") for line in lines[:5])
    assert "█" in lines[0]


def test_png_is_written(tmp_path) -> None:
    values = np.array([1.0, 2.0, 2.5, 3.0])
    st = figure_stats("x", values, limit_min=0.0, limit_max=4.0, unit="V")
    path = write_histogram_png(tmp_path / "sub" / "h.png", [(st, values)], title="t")
    assert path.read_bytes()[:4] == b"\x89PNG"
    # the name as given (no ".png" appended behind the caller's back); a folder is refused
    bare = write_histogram_png(tmp_path / "hist", [(st, values)])
    assert bare == tmp_path / "hist" and bare.read_bytes()[:4] == b"\x89PNG"
    with pytest.raises(InputError, match="cannot write the histogram"):
        write_histogram_png(tmp_path, [(st, values)])
