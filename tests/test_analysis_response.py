"""FrequencyResponse: construction, CSV reading, clear errors, interpolation."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from loopwright.analysis import FrequencyResponse, build_model, wrap_deg
from loopwright.errors import InputError


def _write(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


def _loop(frequency_hz: np.ndarray) -> np.ndarray:
    """2/(s(s+1)(s+2)) time-scaled to w = 1 rad/s at 10 kHz (references.md table)."""
    s = 1j * frequency_hz / 1e4
    return 2.0 / (s * (s + 1) * (s + 2))


def test_from_arrays_keeps_copies_read_only() -> None:
    f = np.array([1e3, 2e3, 4e3])
    h = np.array([2 + 1j, 1 - 1j, 0.5j])
    r = FrequencyResponse(f, h)
    f[0] = 5.0
    assert r.frequency_hz[0] == 1e3
    with pytest.raises(ValueError):
        r.h[0] = 0
    assert len(r) == 3 and not r.has_uncertainty


def test_gain_phase_round_trip() -> None:
    r = FrequencyResponse.from_gain_phase([1e3, 1e4], [20.0, -6.0], [-179.0, 180.0])
    assert np.allclose(r.gain_db, [20.0, -6.0])
    assert np.allclose(r.phase_deg, [-179.0, 180.0])  # wrapped to (-180, 180]


def test_wrap_deg_half_open_interval() -> None:
    assert list(wrap_deg([-180.0, 180.0, 540.0, -190.0, 0.0])) == [180.0, 180.0, 180.0, 170.0,
                                                                   0.0]


@pytest.mark.parametrize(
    ("frequency_hz", "h", "field", "words"),
    [
        ([1e3], [1.0], None, "at least 2 points"),
        ([1e3, 1e3], [1.0, 1.0], "frequency_hz", "duplicate"),
        ([2e3, 1e3], [1.0, 1.0], "frequency_hz", "sorted"),
        ([0.0, 1e3], [1.0, 1.0], "frequency_hz", "not positive"),
        ([np.nan, 1e3], [1.0, 1.0], "frequency_hz", "finite"),
        ([1e3, 2e3], [1.0, np.nan], "gain", "finite"),
        ([1e3, 2e3], [1.0, 0.0], "gain", "zero"),
        ([1e3, 2e3, 3e3], [1.0, 1.0], "h", "has 2 values"),
    ],
)
def test_bad_arrays_raise_input_error(frequency_hz, h, field, words) -> None:
    with pytest.raises(InputError) as info:
        FrequencyResponse(frequency_hz, h)
    assert info.value.field == field
    assert words in str(info.value)


def test_negative_std_is_an_error() -> None:
    with pytest.raises(InputError, match="phase_deg_std"):
        FrequencyResponse([1e3, 2e3], [1.0, 2.0], [0.1, 0.1], [0.1, -0.2])


def test_csv_polar_with_std_and_extra_columns(tmp_path: Path) -> None:
    path = _write(
        tmp_path / "points.csv",
        "index,frequency_hz,gain_db,phase_deg,gain_db_std,phase_deg_std,snr_db\n"
        "0,1000,20,-90,0.1,0.5,40\n"
        "\n"
        "1,2000,14,-120,0.2,0.6,41\n"
        "2,4000,8,-150,0.3,0.7,39\n",
    )
    r = FrequencyResponse.from_csv(path)
    assert np.allclose(r.frequency_hz, [1e3, 2e3, 4e3])
    assert np.allclose(r.gain_db, [20, 14, 8])
    assert np.allclose(r.phase_deg, [-90, -120, -150])
    assert np.allclose(r.gain_db_std, [0.1, 0.2, 0.3])
    assert np.allclose(r.phase_deg_std, [0.5, 0.6, 0.7])
    assert r.source == str(path)


def test_csv_in_the_run_folder_layout(tmp_path: Path) -> None:
    # The run folder's points.csv columns (store/writer.py POINT_COLUMNS), with an
    # unknown (blank) std: re/im are used and the blank std column is dropped.
    from loopwright.store.writer import POINT_COLUMNS

    rows = []
    for k, f in enumerate((1e3, 2e3, 4e3)):
        cells = dict.fromkeys(POINT_COLUMNS, "1")
        cells.update(index=str(k), frequency_hz=str(f), gain_re=str(-2.0 / (k + 1)),
                     gain_im="0.5", gain_db="999", phase_deg="999", gain_db_std="0.1",
                     phase_deg_std="" if k == 1 else "0.2", flags="")
        rows.append(",".join(cells[c] for c in POINT_COLUMNS))
    path = _write(tmp_path / "points.csv", ",".join(POINT_COLUMNS) + "\n" + "\n".join(rows)
                  + "\n")
    r = FrequencyResponse.from_csv(path)
    assert np.allclose(r.h, [-2 + 0.5j, -1 + 0.5j, -2 / 3 + 0.5j])
    assert np.allclose(r.gain_db_std, 0.1)
    assert r.phase_deg_std is None


def test_csv_rectangular(tmp_path: Path) -> None:
    path = _write(tmp_path / "r.csv", "frequency_hz,gain_re,gain_im\n10,1,1\n20,0,-2\n")
    r = FrequencyResponse.from_csv(path)
    assert np.allclose(r.h, [1 + 1j, -2j])
    assert r.gain_db_std is None


@pytest.mark.parametrize(
    ("text", "line", "field", "words"),
    [
        ("frequency_hz,gain_db,phase_deg\n1000,1,2\n500,1,2\n", 3, "frequency_hz", "sorted"),
        ("frequency_hz,gain_db,phase_deg\n1000,1,2\n1000,1,2\n", 3, "frequency_hz",
         "duplicate"),
        ("frequency_hz,gain_db,phase_deg\n1000,1,2\n2000,nan,2\n", 3, "gain_db", "finite"),
        ("frequency_hz,gain_db,phase_deg\n1000,1,2\n2000,abc,2\n", 3, "gain_db",
         "not a number"),
        ("frequency_hz,gain_db,phase_deg\n-1000,1,2\n2000,1,2\n", 2, "frequency_hz",
         "not positive"),
        ("frequency_hz,gain_db,phase_deg\n1000,1,2\n2000,1\n", 3, None, "cells"),
        ("frequency_hz,gain_db\n1000,1\n2000,1\n", 1, None, "phase_deg"),
        ("freq,gain_db,phase_deg\n1000,1,2\n2000,1,2\n", 1, None, "frequency_hz"),
        ("frequency_hz,gain_re\n1000,1\n2000,1\n", 1, None, "gain_im"),
        ("frequency_hz,gain_re,gain_im\n1000,0,0\n2000,1,1\n", 2, "gain_re,gain_im", "zero"),
        ("frequency_hz,gain_db,phase_deg,gain_db_std\n1,1,2,-1\n2,1,2,0\n", 2, "gain_db_std",
         "standard deviation"),
    ],
)
def test_bad_csv_names_file_line_and_column(tmp_path: Path, text, line, field, words) -> None:
    path = _write(tmp_path / "bad.csv", text)
    with pytest.raises(InputError) as info:
        FrequencyResponse.from_csv(path)
    error = info.value
    assert error.path == str(path)
    assert error.line == line
    assert error.field == field
    assert words in str(error)
    assert str(error).startswith(f"{path}:{line}: ")


def test_one_point_csv_is_a_clear_error(tmp_path: Path) -> None:
    path = _write(tmp_path / "one.csv", "frequency_hz,gain_db,phase_deg\n1000,1,2\n")
    with pytest.raises(InputError, match="at least 2 points"):
        FrequencyResponse.from_csv(path)


@pytest.mark.parametrize("content", [b"", b"# only a comment\n", b"\xff\xfe\x00bad"])
def test_empty_or_binary_file(tmp_path: Path, content: bytes) -> None:
    path = tmp_path / "x.csv"
    path.write_bytes(content)
    with pytest.raises(InputError) as info:
        FrequencyResponse.from_csv(path)
    assert info.value.path == str(path)


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="no such file"):
        FrequencyResponse.from_csv(tmp_path / "nope.csv")


def test_interpolate_matches_the_exact_loop_between_sparse_points() -> None:
    # 8 points per decade of exact data; the rational model reproduces the loop.
    f = np.logspace(2, 6, 33)
    r = FrequencyResponse(f, -_loop(f))
    between = np.sqrt(f[:-1] * f[1:])
    exact = -_loop(between)
    assert np.max(np.abs(r.interpolate(between) / exact - 1)) < 1e-8
    assert r.model().method == "aaa"
    # the same values at the measured points
    assert np.allclose(r.interpolate(f), r.h, rtol=1e-10)


def test_interpolate_refuses_to_extrapolate() -> None:
    f = np.logspace(2, 6, 33)
    r = FrequencyResponse(f, -_loop(f))
    with pytest.raises(InputError, match="inside the swept range"):
        r.interpolate([50.0])


def test_sparse_data_needs_the_rational_model() -> None:
    # The requirement's premise: shape-preserving cubics in log f miss the 0.2 deg
    # target at 8 points per decade on a lightly damped loop; the rational fit does not.
    f = np.logspace(2, 6, 33)
    s = 1j * f / 1e4
    loop = 50 * (s + 0.5) / (s * (s + 1) * (s + 20) * (s**2 + 0.3 * s + 9))
    between = np.sqrt(f[:-1] * f[1:])
    s_b = 1j * between / 1e4
    exact = 50 * (s_b + 0.5) / (s_b * (s_b + 1) * (s_b + 20) * (s_b**2 + 0.3 * s_b + 9))
    from loopwright.analysis.interpolate import _pchip

    pchip = _pchip(f, loop, "test", float("nan"))
    pchip_error_deg = np.max(np.abs(np.angle(pchip(between) / exact, deg=True)))
    model = build_model(f, loop)
    aaa_error_deg = np.max(np.abs(np.angle(model(between) / exact, deg=True)))
    assert model.method == "aaa"
    assert pchip_error_deg > 0.2
    assert aaa_error_deg < 1e-6


def test_noisy_data_falls_back_to_pchip() -> None:
    rng = np.random.default_rng(3)
    f = np.logspace(2, 6, 81)
    noisy = -_loop(f) * 10 ** (rng.normal(0, 0.1, f.size) / 20) * np.exp(
        1j * np.deg2rad(rng.normal(0, 0.5, f.size))
    )
    model = build_model(f, noisy)
    assert model.method == "pchip"
    assert "held-out" in model.reason
    assert np.allclose(model(f), noisy)  # still passes through the points


@pytest.mark.filterwarnings("ignore:AAA failed to converge")
def test_froissart_doublets_are_detected() -> None:
    # Nakatsukasa, Sete & Trefethen 2018, sec. 5: fitting noise to a tight tolerance
    # without clean-up leaves pole-zero pairs with tiny residues (Froissart doublets).
    from scipy.interpolate import AAA

    from loopwright.analysis.interpolate import _spurious_poles

    rng = np.random.default_rng(4)
    f = np.logspace(2, 6, 81)
    z = 1j * f / 1e4
    exact = -_loop(f) * z**1 * (1 + z) ** 2  # flattened as build_model does
    noisy = exact * (1 + 1e-6 * rng.normal(size=f.size))
    dirty = AAA(z, noisy, rtol=1e-15, max_terms=40, clean_up=False)
    clean = AAA(z, exact)
    assert _spurious_poles(dirty, z, noisy) > 0
    assert _spurious_poles(clean, z, exact) == 0


def test_long_noisy_sweep_falls_back() -> None:
    rng = np.random.default_rng(8)
    f = np.logspace(2, 6, 2001)
    noisy = -_loop(f) * 10 ** (rng.normal(0, 0.05, f.size) / 20)
    model = build_model(f, noisy)
    assert model.method == "pchip"
    exact_long = build_model(f, -_loop(f))
    assert exact_long.method == "aaa"
