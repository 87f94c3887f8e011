"""Windows of the DFT estimator against Harris, "On the use of windows for harmonic
analysis with the discrete Fourier transform", Proc. IEEE 66(1), 1978, Table I."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal

from loopwright.dsp import WINDOWS, estimate_point, window_metrics
from loopwright.dsp.windows import make_window

# Harris 1978 Table I: scalloping loss (dB) and ENBW (bins)
HARRIS_TABLE_I = {
    "rectangular": (3.92, 1.00),
    "hann": (1.42, 1.50),
    "blackman-harris": (0.83, 2.00),  # the 4-term -92 dB row (mem)
}


@pytest.mark.parametrize("name", HARRIS_TABLE_I)
def test_scalloping_and_enbw_match_harris_table_1(name):
    loss_db, enbw_bins = HARRIS_TABLE_I[name]
    enbw, loss = window_metrics(name, 4096)
    assert loss == pytest.approx(loss_db, abs=0.005)
    assert enbw == pytest.approx(enbw_bins, abs=0.005)


@pytest.mark.parametrize("name", list(WINDOWS))
def test_windows_are_scipy_periodic_windows(name):
    scipy_name = WINDOWS[name][0]
    expected = scipy.signal.windows.get_window(scipy_name, 1000, fftbins=True)
    np.testing.assert_array_equal(make_window(name, 1000), expected)
    # ENBW computed by scipy's own window, N sum w^2 / (sum w)^2
    enbw, _ = window_metrics(name, 1000)
    assert enbw == pytest.approx(1000 * np.sum(expected**2) / np.sum(expected) ** 2, rel=1e-12)


@pytest.mark.parametrize("name", ["rectangular", "hann"])
def test_dtft_at_stimulus_has_no_scalloping_loss(name):
    # half a bin off the grid, a DFT bin loses Harris's scalloping loss; the DTFT
    # evaluated at the stimulus frequency loses nothing
    n_samples, fs = 8192, 1.0
    cycles = 512.5
    f = cycles / n_samples
    t = np.arange(n_samples)
    ref = np.cos(2 * np.pi * f * t)
    p = estimate_point(ref, 0.5 * ref, fs, f, method="dft", window=name)
    assert p.reference.amplitude_v == pytest.approx(1.0, abs=2e-3)
    assert p.gain_db == pytest.approx(20 * math.log10(0.5), abs=1e-9)
    # the naive bin: |X[512]| / (sum w / 2) shows the loss of Table I
    w = make_window(name, n_samples)
    bin_amp = abs(np.fft.rfft(ref * w)[512]) / (w.sum() / 2)
    assert -20 * math.log10(bin_amp) == pytest.approx(HARRIS_TABLE_I[name][0], abs=0.02)
