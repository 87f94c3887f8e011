"""Sine fits against IEEE Std 1057 / 1241 definitions and scipy.optimize.least_squares."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize

from loopwright.dsp import fit_sine_3p, fit_sine_4p
from loopwright.dsp.sinefit import seed_frequency
from loopwright.dsp.tonesums import data_sums, tone_sums
from loopwright.errors import EstimationError


def _model(params, n, fs, n_harm):
    """IEEE Std 1057 model: C + sum_h a_h cos(h w t) + b_h sin(h w t), t = n / fs."""
    f, c = params[0], params[1]
    y = np.full(n.size, c)
    for h in range(1, n_harm + 1):
        arg = 2 * np.pi * h * f * n / fs
        y = y + params[2 * h] * np.cos(arg) + params[2 * h + 1] * np.sin(arg)
    return y


def _jac(params, n, fs, n_harm):
    f = params[0]
    cols = [np.zeros(n.size), np.ones(n.size)]
    d_f = np.zeros(n.size)
    for h in range(1, n_harm + 1):
        arg = 2 * np.pi * h * f * n / fs
        cos, sin = np.cos(arg), np.sin(arg)
        cols += [cos, sin]
        d_f += 2 * np.pi * h * n / fs * (-params[2 * h] * sin + params[2 * h + 1] * cos)
    cols[0] = d_f
    return np.stack(cols, axis=1)


@pytest.mark.parametrize("n_samples", [1000, 1237, 4096, 100_003])
def test_block_sums_equal_direct_sums(n_samples):
    # the blocked sums are an exact rewrite of sum_n u^p y[n] exp(-j theta n)
    rng = np.random.default_rng(5)
    n = np.arange(n_samples)
    u = n - (n_samples - 1) / 2
    theta = np.array([0.0, 0.0123, 0.5, 3.0])
    y = rng.standard_normal((2, n_samples))
    e = np.exp(-1j * np.outer(n, theta))
    s0, s1 = data_sums(y, theta, with_u=True)
    np.testing.assert_allclose(s0, y @ e, rtol=0, atol=1e-9 * np.abs(y @ e).max())
    np.testing.assert_allclose(s1, (y * u) @ e, rtol=0, atol=1e-9 * np.abs((y * u) @ e).max())
    t = tone_sums(theta, n_samples, 2)
    for p in range(3):
        direct = (u**p) @ np.conj(e)
        np.testing.assert_allclose(t[p], direct, rtol=0, atol=1e-9 * np.abs(direct).max())


@pytest.mark.parametrize("cycles", [2.3, 17.0, 123.456])
def test_three_parameter_fit_matches_scipy_least_squares(cycles):
    # IEEE Std 1057 three-parameter fit (frequency known) vs a generic least-squares solver
    rng = np.random.default_rng(11)
    n_samples, fs = 2000, 50_000.0
    f = cycles * fs / n_samples
    n = np.arange(n_samples)
    y = 0.8 * np.cos(2 * np.pi * f * n / fs + 1.1) + 0.25 + 0.05 * rng.standard_normal(n_samples)
    fit = fit_sine_3p(y, fs, f, harmonics=3)
    res = scipy.optimize.least_squares(
        lambda p: _model(np.r_[f, p], n, fs, 3) - y,
        x0=np.zeros(7),
        jac=lambda p: _jac(np.r_[f, p], n, fs, 3)[:, 1:],
        method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15,
    )
    ours = np.r_[fit.offset_v, np.ravel(np.c_[fit.cos_v, fit.sin_v])]
    np.testing.assert_allclose(ours, res.x, rtol=1e-9, atol=1e-9 * np.abs(res.x).max())


@pytest.mark.parametrize("cycles", [3.7, 41.25, 400.9])
def test_four_parameter_fit_matches_scipy_least_squares(cycles):
    # IEEE Std 1057 four-parameter fit with harmonics: same minimum as least_squares
    rng = np.random.default_rng(12)
    n_samples, fs = 3000, 1.0e6
    f = cycles * fs / n_samples
    n = np.arange(n_samples)
    arg = 2 * np.pi * f * n / fs
    y = (
        1.2 * np.cos(arg - 0.7) + 0.1 * np.cos(2 * arg + 0.3) + 0.04 * np.cos(3 * arg)
        - 0.3 + 0.02 * rng.standard_normal(n_samples)
    )
    fit = fit_sine_4p(y, fs, f * (1 + 2e-4), harmonics=3)
    x0 = np.r_[f * (1 + 1e-5), fit.offset_v, np.ravel(np.c_[fit.cos_v, fit.sin_v]) * 1.01]
    res = scipy.optimize.least_squares(
        lambda p: _model(p, n, fs, 3) - y,
        x0=x0,
        jac=lambda p: _jac(p, n, fs, 3),
        method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15, x_scale="jac",
    )
    assert fit.frequency_hz == pytest.approx(res.x[0], rel=1e-9)
    ours = np.r_[fit.offset_v, np.ravel(np.c_[fit.cos_v, fit.sin_v])]
    np.testing.assert_allclose(ours, res.x[1:], rtol=0, atol=1e-9 * np.abs(res.x[1:]).max())


@pytest.mark.parametrize("offset_ppm", [-500.0, 0.0, 500.0])
@pytest.mark.parametrize("cycles", [2.5, 60.3, 9000.7])
def test_four_parameter_fit_recovers_clock_offset(offset_ppm, cycles):
    # a generator/scope clock offset of +-500 ppm: the fit starts from the interpolated
    # DFT peak and lands on the true frequency (IEEE Std 1057 four-parameter fit)
    n_samples, fs = 20_000, 1.0e6
    f_nominal = cycles * fs / n_samples
    f_true = f_nominal * (1 + offset_ppm * 1e-6)
    n = np.arange(n_samples)
    y = 0.9 * np.cos(2 * np.pi * f_true * n / fs + 2.0) + 0.1
    fit = fit_sine_4p(y, fs, f_nominal, harmonics=9)
    assert fit.frequency_hz == pytest.approx(f_true, rel=1e-11)
    assert float(fit.amplitude_v) == pytest.approx(0.9, rel=1e-9)
    assert float(fit.phase_rad) == pytest.approx(2.0, abs=1e-8)
    assert float(fit.offset_v) == pytest.approx(0.1, abs=1e-9)


@pytest.mark.parametrize("off_bins", [-0.45, -0.3, 0.3, 0.45])
def test_seed_is_within_a_small_fraction_of_a_bin(off_bins):
    # the Hann two-bin interpolation (Grandke 1983 (mem)) seeds well inside the
    # half-bin convergence region of the four-parameter fit (references.md, measured)
    n_samples, fs = 8192, 1.0
    cycles = 200.0 + off_bins
    y = np.cos(2 * np.pi * cycles * np.arange(n_samples) / n_samples + 0.3) + 2.0
    seed = seed_frequency(y, fs, 200.0 / n_samples)
    assert abs(seed * n_samples - cycles) < 0.02


def test_batch_three_parameter_fit_equals_one_by_one():
    rng = np.random.default_rng(3)
    y = rng.standard_normal((4, 1500)) + np.cos(2 * np.pi * 0.0123 * np.arange(1500))
    batch = fit_sine_3p(y, 1.0, 0.0123, harmonics=5)
    for i in range(4):
        one = fit_sine_3p(y[i], 1.0, 0.0123, harmonics=5)
        np.testing.assert_allclose(batch.cos_v[i], one.cos_v, rtol=1e-12)
        np.testing.assert_allclose(batch.noise_var_v2[i], one.noise_var_v2, rtol=1e-10)


def test_fits_reject_bad_records():
    with pytest.raises(EstimationError, match="NaN"):
        fit_sine_3p(np.array([0.0, np.nan] * 20), 1.0, 0.1)
    with pytest.raises(EstimationError, match="Nyquist"):
        fit_sine_3p(np.ones(100), 1.0, 0.5)
    with pytest.raises(EstimationError, match="cycles"):
        fit_sine_4p(np.ones(100), 1.0, 0.01)
    with pytest.raises(EstimationError, match="empty"):
        fit_sine_3p(np.array([]), 1.0, 0.1)
