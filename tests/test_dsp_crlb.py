"""Monte-Carlo: the sine-fit estimates reach the Cramer-Rao lower bound.

Bounds (white Gaussian noise, N samples, eta = A^2 / (2 sigma^2)): var(A) >= 2 sigma^2 / N,
var(phi) >= 1 / (N eta) at known frequency; two channels with independent noise:
var(dphi) ~ var(G)/G^2 ~ 1/(N eta1) + 1/(N eta2). Kay, Fundamentals of Statistical
Signal Processing I (1993), Example 3.14 (mem); Rife & Boorstyn, IEEE Trans. IT 1974.
2000 trials, N = 4096, SNR 20 dB, fixed seed; std/CRLB within 5 %, the reported std
within 15 % of the empirical one.
"""

from __future__ import annotations

import numpy as np
import pytest

from loopwright.dsp import estimate_point, fit_sine_3p

N = 4096
TRIALS = 2000
SNR_DB = 20.0
GAIN = 0.5
DPHI = -1.0  # rad
CASES = {"coherent": 127.0, "non-coherent": 127.37}  # cycles per record (127 coprime to 4096)


def _records(cycles, rng, trials=TRIALS):
    n = np.arange(N)
    eta = 10 ** (SNR_DB / 10)
    amp_ref, amp_resp = 1.0, GAIN
    sig_ref = amp_ref / np.sqrt(2 * eta)
    sig_resp = amp_resp / np.sqrt(2 * eta)
    phase0 = rng.uniform(-np.pi, np.pi, size=(trials, 1))
    arg = 2 * np.pi * cycles / N * n + phase0
    ref = amp_ref * np.cos(arg) + 0.2 + sig_ref * rng.standard_normal((trials, N))
    resp = amp_resp * np.cos(arg + DPHI) - 0.1 + sig_resp * rng.standard_normal((trials, N))
    return ref, resp, eta, phase0[:, 0]


@pytest.mark.parametrize("case", CASES)
def test_batch_fit_reaches_cramer_rao_bound(case):
    rng = np.random.default_rng(20240)
    cycles = CASES[case]
    ref, resp, eta, phase0 = _records(cycles, rng)
    f = cycles / N
    fr = fit_sine_3p(ref, 1.0, f)
    fs = fit_sine_3p(resp, 1.0, f)
    # one channel: amplitude and phase (IEEE Std 1057 three-parameter fit)
    crlb_amp = np.sqrt(2 * (1.0 / (2 * eta)) / N)  # sigma^2 = A^2 / (2 eta), A = 1
    crlb_phase = np.sqrt(1 / (N * eta))
    assert np.std(fr.amplitude_v) / crlb_amp == pytest.approx(1.0, abs=0.05)
    phase_err = np.angle(np.exp(1j * (fr.phase_rad - phase0)))
    assert np.std(phase_err) / crlb_phase == pytest.approx(1.0, abs=0.05)
    # two channels: H = response / reference
    h = fs.phasor / fr.phasor
    crlb_two = np.sqrt(2 / (N * eta))
    assert np.std(np.angle(h * np.exp(-1j * DPHI))) / crlb_two == pytest.approx(1.0, abs=0.05)
    assert np.std(np.abs(h)) / GAIN / crlb_two == pytest.approx(1.0, abs=0.05)
    # reported std from the fit residuals vs the empirical spread
    vl_r, vp_r = fr.log_amplitude_phase_var
    vl_s, vp_s = fs.log_amplitude_phase_var
    reported_phase = np.sqrt(np.mean(vp_r + vp_s))
    reported_gain = np.sqrt(np.mean(vl_r + vl_s))
    assert reported_phase / np.std(np.angle(h)) == pytest.approx(1.0, abs=0.15)
    assert reported_gain / np.std(np.log(np.abs(h))) == pytest.approx(1.0, abs=0.15)


@pytest.mark.slow
@pytest.mark.parametrize("case", CASES)
def test_two_channel_estimate_reaches_cramer_rao_bound(case):
    # end to end: four-parameter refinement on the reference, three-parameter on both
    rng = np.random.default_rng(777)
    cycles = CASES[case]
    ref, resp, eta, _ = _records(cycles, rng)
    nominal = cycles / N * (1 + 3e-4)  # a clock offset the refinement has to absorb
    gains, phases, g_std, p_std = [], [], [], []
    for i in range(TRIALS):
        p = estimate_point(ref[i], resp[i], 1.0, nominal, harmonics=1)
        gains.append(p.gain)
        phases.append(p.phase_deg)
        g_std.append(p.gain_db_std)
        p_std.append(p.phase_deg_std)
    h = np.array(gains)
    crlb = np.sqrt(2 / (N * eta))
    phase_err = np.angle(h * np.exp(-1j * DPHI))
    assert abs(np.mean(phase_err)) < 4 * crlb / np.sqrt(TRIALS)  # unbiased
    assert np.std(phase_err) / crlb == pytest.approx(1.0, abs=0.05)
    assert np.std(np.abs(h)) / GAIN / crlb == pytest.approx(1.0, abs=0.05)
    emp_phase_deg = np.degrees(np.std(phase_err))
    emp_gain_db = np.std(20 * np.log10(np.abs(h)))
    assert np.sqrt(np.mean(np.square(p_std))) / emp_phase_deg == pytest.approx(1.0, abs=0.15)
    assert np.sqrt(np.mean(np.square(g_std))) / emp_gain_db == pytest.approx(1.0, abs=0.15)
