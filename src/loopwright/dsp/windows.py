"""Windows for the DFT-at-stimulus estimator and a noise floor from the spectrum.

Window names of our own map to :func:`scipy.signal.windows.get_window` (periodic,
"DFT-even" form, as in Harris 1978): ``hann``, ``rectangular``, ``blackman-harris``,
``flattop``.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft
import scipy.signal
from numpy.typing import NDArray

from loopwright.dsp.tonesums import data_sums
from loopwright.errors import EstimationError

__all__ = ["WINDOWS", "make_window", "spectral_noise_var", "window_metrics"]

# our name -> (scipy name, main-lobe half-width in bins)
WINDOWS: dict[str, tuple[str, int]] = {
    "hann": ("hann", 2),
    "rectangular": ("boxcar", 1),
    "blackman-harris": ("blackmanharris", 4),
    "flattop": ("flattop", 5),
}


def make_window(name: str, n_samples: int) -> NDArray[np.float64]:
    """The periodic window ``name`` of length ``n_samples``."""
    try:
        scipy_name, _ = WINDOWS[name]
    except KeyError:
        choices = ", ".join(WINDOWS)
        raise EstimationError(f"unknown window {name!r}; choose one of: {choices}") from None
    return scipy.signal.windows.get_window(scipy_name, n_samples, fftbins=True)


def window_metrics(name: str, n_samples: int = 4096) -> tuple[float, float]:
    """Equivalent noise bandwidth (bins) and scalloping loss (dB) of a window.

    ENBW = ``N sum w^2 / (sum w)^2``; scalloping loss = the drop of the window's DTFT
    half a bin off its centre, evaluated with the same DTFT routine the DFT estimator
    uses (Harris, Proc. IEEE 66(1), 1978, Table I lists both).
    """
    w = make_window(name, n_samples)
    enbw = n_samples * float(w @ w) / float(w.sum()) ** 2
    s, _ = data_sums(w, np.array([0.0, math.pi / n_samples]))
    loss_db = -20.0 * math.log10(abs(s[1]) / abs(s[0]))
    return enbw, loss_db


def spectral_noise_var(
    y: NDArray[np.float64], window: NDArray[np.float64], tone_bins: NDArray, half_width: int
) -> float:
    """White-noise variance per sample from the median of a windowed periodogram.

    Bins within ``half_width + 2`` of DC and of each tone are left out; for white noise
    ``|Y_k|^2`` is exponential with mean ``sigma^2 sum w^2``, whose median is ``ln 2``
    times the mean, so ``sigma^2 = median / (ln 2 sum w^2)``. The median keeps leakage
    tails of strong tones from inflating the estimate. Falls back to the variance left
    after the tones when fewer than 8 bins remain (very short records); returns 0 for
    a noise-free record.
    """
    n = y.size
    spec = np.abs(scipy.fft.rfft((y - y.mean()) * window, workers=1)) ** 2
    keep = np.ones(spec.size, dtype=bool)
    guard = half_width + 2
    for centre in np.concatenate([[0.0], np.asarray(tone_bins, dtype=float)]):
        lo = max(int(np.floor(centre - guard)), 0)
        hi = min(int(np.ceil(centre + guard)) + 1, spec.size)
        keep[lo:hi] = False
    keep[-1] = keep[-1] and n % 2 == 1  # a Nyquist bin of an even record is real
    if keep.sum() < 8:
        return math.nan
    return float(np.median(spec[keep]) / math.log(2.0) / float(window @ window))
