"""Two-channel estimates: known answers, distortion, clock offsets, bad input."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from loopwright.dsp import ESTIMATORS, PointEstimate, estimate_point, register_estimator
from loopwright.dsp.point import wrap_phase_deg
from loopwright.errors import EstimationError

FS = 1.0e6


def _tone(f, n_samples, amp, phase, offset=0.0, harmonics=(), fs=FS):
    """amp cos(2 pi f t + phase) + offset + sum of (order, amplitude, phase) harmonics."""
    t = np.arange(n_samples) / fs
    y = amp * np.cos(2 * np.pi * f * t + phase) + offset
    for order, h_amp, h_phase in harmonics:
        y = y + h_amp * np.cos(2 * np.pi * order * f * t + h_phase)
    return y


def _rc_lowpass(f, r_ohm=4.7e3, c_farad=22e-9):
    """First-order RC low-pass, H = 1 / (1 + j w R C) (textbook formula)."""
    return 1.0 / (1.0 + 1j * 2 * np.pi * f * r_ohm * c_farad)


def test_registry_names_the_three_estimators():
    assert {"sinefit", "dft", "xcorr"} <= set(ESTIMATORS)
    with pytest.raises(ValueError, match="already registered"):
        register_estimator("dft")(lambda *a, **k: None)


# RC low-pass: fc = 1 / (2 pi 4.7k 22n) = 1539.2 Hz; 50,000 samples at 1 MS/s.
# The sine fit is exact (noise-free data); the windowed estimators carry a small
# leakage bias, bounded here by values measured with numpy 2 / scipy 1.1x.
RC_TOLERANCE = {"sinefit": (1e-9, 1e-9), "dft": (1e-5, 1e-4), "xcorr": (1e-3, 1e-3)}


@pytest.mark.parametrize("method", ["sinefit", "dft", "xcorr"])
@pytest.mark.parametrize("f", [100.0, 1000.0, 1539.2, 5000.0, 20000.0])
def test_rc_lowpass_known_answer(method, f):
    h = _rc_lowpass(f)
    ref = _tone(f, 50_000, 0.5, 0.2, offset=0.05)
    resp = _tone(f, 50_000, 0.5 * abs(h), 0.2 + np.angle(h), offset=1.0)
    p = estimate_point(ref, resp, FS, f, method=method)
    tol_db, tol_deg = RC_TOLERANCE[method]
    assert p.gain_db == pytest.approx(20 * np.log10(abs(h)), abs=tol_db)
    assert p.phase_deg == pytest.approx(np.degrees(np.angle(h)), abs=tol_deg)
    assert p.gain == pytest.approx(complex(h), abs=tol_db)
    assert p.reference.offset_v == pytest.approx(0.05, abs=1e-3)
    assert p.response.offset_v == pytest.approx(1.0, abs=1e-3)


@pytest.mark.parametrize("offset_ppm", [-500.0, 500.0])
@pytest.mark.parametrize("cycles", [3.3, 250.5, 4000.2])
def test_clock_offset_does_not_bias_the_sine_fit(offset_ppm, cycles):
    # the scope and generator clocks differ by 500 ppm: the refined frequency absorbs it
    n_samples = 20_000
    f_nominal = cycles * FS / n_samples
    f_true = f_nominal * (1 + offset_ppm * 1e-6)
    g = 1.7 * np.exp(1j * np.radians(123.4))
    ref = _tone(f_true, n_samples, 0.3, -2.0, offset=0.1)
    resp = _tone(f_true, n_samples, 0.3 * abs(g), -2.0 + np.angle(g), offset=-0.2)
    p = estimate_point(ref, resp, FS, f_nominal)
    assert p.frequency_hz == pytest.approx(f_true, rel=1e-10)
    assert p.gain == pytest.approx(complex(g), abs=1e-9)
    assert p.phase_deg == pytest.approx(123.4, abs=1e-9)


@pytest.mark.parametrize("off_bins", [-0.3, 0.3])
def test_nominal_frequency_a_third_of_a_bin_off(off_bins):
    n_samples = 4096
    f_true = 37.25 * FS / n_samples
    f_nominal = f_true + off_bins * FS / n_samples
    g = 0.01 * np.exp(-1j * np.radians(170.0))
    ref = _tone(f_true, n_samples, 2.0, 0.5)
    resp = _tone(f_true, n_samples, 2.0 * abs(g), 0.5 + np.angle(g))
    p = estimate_point(ref, resp, FS, f_nominal)
    assert p.gain_db == pytest.approx(-40.0, abs=1e-9)
    assert p.phase_deg == pytest.approx(-170.0, abs=1e-9)


def test_harmonics_count_as_thd_not_noise():
    # noise-free records with harmonics 2, 3, 5 (and 7 for the response): THD equals the
    # synthesised value, gain/phase of the fundamental exact (IEEE Std 1057 fit with
    # harmonic columns)
    n_samples, f = 10_000, 1234.5
    ref_h = ((2, 0.03, 0.1), (3, 0.01, -1.0), (5, 0.005, 2.0))
    resp_h = ((2, 0.002, 0.4), (3, 0.02, 0.0), (7, 0.001, 1.0))
    ref = _tone(f, n_samples, 1.0, 0.3, 0.5, ref_h)
    resp = _tone(f, n_samples, 0.25, 0.3 - 0.9, -0.5, resp_h)
    p = estimate_point(ref, resp, FS, f)
    thd_ref = 100 * math.sqrt(0.03**2 + 0.01**2 + 0.005**2) / 1.0
    thd_resp = 100 * math.sqrt(0.002**2 + 0.02**2 + 0.001**2) / 0.25
    assert p.reference.thd_pct == pytest.approx(thd_ref, rel=1e-9)
    assert p.response.thd_pct == pytest.approx(thd_resp, rel=1e-9)
    assert p.gain_db == pytest.approx(20 * math.log10(0.25), abs=1e-9)
    assert p.phase_deg == pytest.approx(math.degrees(-0.9), abs=1e-9)
    assert p.reference.snr_db > 120  # the harmonics are not noise
    assert p.gain_db_std < 1e-5


def test_harmonics_above_nyquist_are_left_out():
    # f = 90 kHz at 1 MS/s: orders 2..5 are below Nyquist, 6..9 above
    n_samples, f = 5000, 90e3
    ref = _tone(f, n_samples, 1.0, 0.0, 0.0, ((2, 0.02, 0.0), (5, 0.01, 1.0)))
    p = estimate_point(ref, ref * 0.5, FS, f)
    assert p.details["harmonics_fitted"] == 5
    assert p.reference.thd_pct == pytest.approx(100 * math.hypot(0.02, 0.01), rel=1e-9)


@pytest.mark.parametrize("method", ["dft", "xcorr"])
def test_windowed_estimators_thd(method):
    # whole number of cycles per segment: leakage-free, THD as synthesised
    n_samples, f = 64_000, 2000.0
    ref = _tone(f, n_samples, 1.0, 0.3, 0.1, ((2, 0.05, 0.0), (3, 0.02, 0.5)))
    p = estimate_point(ref, 2 * ref, FS, f, method=method)
    assert p.reference.thd_pct == pytest.approx(100 * math.hypot(0.05, 0.02), rel=1e-6)
    assert p.gain_db == pytest.approx(20 * math.log10(2), abs=1e-9)


@pytest.mark.parametrize("method", ["sinefit", "dft", "xcorr"])
def test_noise_figures_are_honest(method):
    # SNR and noise rms from the estimator's own noise estimate: within 10 % of the truth
    rng = np.random.default_rng(9)
    n_samples, f = 32_768, 3141.0
    ref = _tone(f, n_samples, 1.0, 0.0) + 0.01 * rng.standard_normal(n_samples)
    resp = _tone(f, n_samples, 0.1, 1.0) + 0.003 * rng.standard_normal(n_samples)
    p = estimate_point(ref, resp, FS, f, method=method)
    assert p.reference.noise_rms_v == pytest.approx(0.01, rel=0.1)
    assert p.response.noise_rms_v == pytest.approx(0.003, rel=0.1)
    assert p.reference.snr_db == pytest.approx(10 * math.log10(0.5 / 1e-4), abs=0.5)
    assert 0 < p.phase_deg_std < 1 and 0 < p.gain_db_std < 0.1


def test_inputs_are_not_modified():
    ref = _tone(1000.0, 4000, 1.0, 0.0, 0.3)
    resp = _tone(1000.0, 4000, 0.5, 1.0, -0.3)
    ref.flags.writeable = False
    resp.flags.writeable = False
    before = (ref.copy(), resp.copy())
    for method in ESTIMATORS:
        estimate_point(ref, resp, FS, 1000.0, method=method)
    np.testing.assert_array_equal(ref, before[0])
    np.testing.assert_array_equal(resp, before[1])


def test_to_dict_is_json_ready():
    ref = _tone(1000.0, 4000, 1.0, 0.0)
    p = estimate_point(ref, -ref, FS, 1000.0)
    assert isinstance(p, PointEstimate)
    d = json.loads(json.dumps(p.to_dict()))
    for key in ("frequency_hz", "gain_db", "phase_deg", "gain_db_std", "phase_deg_std",
                "gain_re", "gain_im", "method", "reference", "response"):
        assert key in d
    for key in ("amplitude_v", "offset_v", "snr_db", "thd_pct", "phase_deg", "noise_rms_v"):
        assert key in d["reference"] and key in d["response"]
    assert d["phase_deg"] == pytest.approx(180.0)  # -1 is +180, never -180
    assert d["gain_re"] == pytest.approx(-1.0)


@pytest.mark.parametrize(
    ("value", "wrapped"), [(180.0, 180.0), (-180.0, 180.0), (190.0, -170.0), (-540.0, 180.0),
                           (359.0, -1.0), (0.0, 0.0)]
)
def test_wrap_phase(value, wrapped):
    assert wrap_phase_deg(value) == pytest.approx(wrapped)


GOOD = _tone(1000.0, 1000, 1.0, 0.0)


@pytest.mark.parametrize(
    ("ref", "resp", "fs", "f", "match"),
    [
        (np.array([]), np.array([]), FS, 1000.0, "empty"),
        (GOOD, GOOD[:-1], FS, 1000.0, "differ in length"),
        (np.where(np.arange(1000) == 7, np.nan, GOOD), GOOD, FS, 1000.0, "NaN/inf.*index 7"),
        (GOOD, np.where(np.arange(1000) == 3, np.inf, GOOD), FS, 1000.0, "NaN/inf"),
        (GOOD, GOOD, FS, 6e5, "Nyquist"),
        (GOOD, GOOD, FS, 1500.0, "cycles"),
        (np.zeros(1000), GOOD, FS, 10000.0, "flat"),
        (GOOD, GOOD, -1.0, 1000.0, "sample_rate_hz"),
        (GOOD, GOOD, FS, float("nan"), "frequency_hz"),
        (GOOD.reshape(10, 100), GOOD.reshape(10, 100), FS, 1000.0, "1-D"),
    ],
)
def test_bad_records_raise_estimation_error(ref, resp, fs, f, match):
    with pytest.raises(EstimationError, match=match):
        estimate_point(ref, resp, fs, f)


def test_unknown_method_option_and_window():
    with pytest.raises(EstimationError, match="unknown estimator"):
        estimate_point(GOOD, GOOD, FS, 10000.0, method="guess")
    with pytest.raises(EstimationError, match="unexpected keyword"):
        estimate_point(GOOD, GOOD, FS, 10000.0, method="sinefit", window="hann")
    with pytest.raises(EstimationError, match="unknown window"):
        estimate_point(GOOD, GOOD, FS, 10000.0, method="dft", window="triangle")
    with pytest.raises(EstimationError, match="segments"):
        estimate_point(GOOD, GOOD, FS, 10000.0, method="xcorr", segments=9)
    for method, option in (("sinefit", {"harmonics": 0}), ("dft", {"harmonics": -1}),
                           ("xcorr", {"harmonics": 1.5}), ("sinefit", {"harmonics": True}),
                           ("sinefit", {"max_offset_ppm": -1.0}),
                           ("sinefit", {"max_offset_ppm": float("nan")})):
        with pytest.raises(EstimationError, match=next(iter(option))):
            estimate_point(GOOD, GOOD, FS, 10000.0, method=method, **option)


def test_no_tone_near_the_nominal_frequency_is_refused_or_reported():
    # the reference holds a tone at 50 kHz; at the nominal 1 kHz there is only noise:
    # either a clear error or a point whose reference SNR says there is nothing there
    rng = np.random.default_rng(1)
    noise = rng.standard_normal(5000)
    tone = _tone(50_000.0, 5000, 1.0, 0.0)
    try:
        p = estimate_point(tone + 1e-3 * noise, noise, FS, 1000.0)
    except EstimationError as exc:
        assert "1000 Hz" in str(exc)
    else:
        assert p.reference.snr_db < 0


@pytest.mark.parametrize(
    ("n_samples", "cycles"), [(16, 2.0), (64, 2.0), (1000, 2.01), (1000, 497.5), (3001, 1234.56)]
)
def test_edge_records_sine_fit_exact(n_samples, cycles):
    # shortest records, exactly two cycles, a stimulus close to Nyquist: the IEEE Std 1057
    # fit stays exact on noise-free data
    f = cycles * FS / n_samples
    ref = _tone(f, n_samples, 1.0, 1.0, 0.5)
    resp = _tone(f, n_samples, 0.3, 0.2, -1.0)
    p = estimate_point(ref, resp, FS, f)
    assert p.gain_db == pytest.approx(20 * math.log10(0.3), abs=1e-9)
    assert p.phase_deg == pytest.approx(math.degrees(-0.8), abs=1e-8)


@pytest.mark.parametrize("method", ["dft", "xcorr"])
def test_windowed_estimators_near_nyquist(method):
    # 0.4975 cycles/sample: segments must keep the image of the tone out of the main lobe
    n_samples = 1000
    f = 0.4975 * FS
    ref = _tone(f, n_samples, 1.0, 1.0, 0.5)
    resp = _tone(f, n_samples, 0.3, 0.2, -1.0)
    p = estimate_point(ref, resp, FS, f, method=method)
    assert p.gain_db == pytest.approx(20 * math.log10(0.3), abs=1e-6)
    assert p.phase_deg == pytest.approx(math.degrees(-0.8), abs=1e-5)


@pytest.mark.slow
def test_ten_million_samples():
    n_samples, f = 10_000_000, 1234.5678
    g = 0.7 * np.exp(1j * 0.3)
    rng = np.random.default_rng(4)
    ref = _tone(f * (1 + 2e-4), n_samples, 1.0, 0.0) + 1e-3 * rng.standard_normal(n_samples)
    resp = _tone(f * (1 + 2e-4), n_samples, abs(g), np.angle(g))
    p = estimate_point(ref, resp, FS, f)
    assert p.gain == pytest.approx(complex(g), abs=1e-5)
    assert p.frequency_hz == pytest.approx(f * (1 + 2e-4), rel=1e-9)
