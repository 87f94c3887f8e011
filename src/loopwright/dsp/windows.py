"""Windows for the DFT-at-stimulus estimator and a noise floor from the spectrum.

Window names of our own map to :func:`scipy.signal.windows.get_window` (periodic,
"DFT-even" form, as in Harris 1978): ``hann``, ``rectangular``, ``blackman-harris``,
``flattop``.
"""

from __future__ import annotations

import functools
import math

import numpy as np
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


def check_window(name: str) -> None:
    """Refuse a window name not in :data:`WINDOWS` (an :class:`EstimationError`)."""
    if name not in WINDOWS:
        choices = ", ".join(WINDOWS)
        raise EstimationError(f"unknown window {name!r}; choose one of: {choices}")


def make_window(name: str, n_samples: int) -> NDArray[np.float64]:
    """The periodic window ``name`` of length ``n_samples`` (read-only, cached)."""
    check_window(name)
    return _cached_window(name, int(n_samples))


@functools.lru_cache(maxsize=16)
def _cached_window(name: str, n_samples: int) -> NDArray[np.float64]:
    # imported here: scipy.signal takes about a second to import, and the command
    # line should not pay for it unless a window is used
    import scipy.signal.windows

    w = scipy.signal.windows.get_window(WINDOWS[name][0], n_samples, fftbins=True)
    w.flags.writeable = False
    return w


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


# longest periodogram used for the noise floor; longer records are sampled in
# NOISE_SEGMENTS pieces of this length spread over the record
NOISE_FFT_LEN = 1 << 16
NOISE_SEGMENTS = 16


def spectral_noise_var(
    y: NDArray[np.float64], window_name: str, theta: float, n_harm: int
) -> float:
    """White-noise variance per sample from the median of a windowed periodogram.

    Bins within the window's main lobe plus two bins of DC and of each harmonic
    ``h theta`` (``h = 1..n_harm``) are left out; for white noise ``|Y_k|^2`` is
    exponential with mean ``sigma^2 sum w^2``, whose median is ``ln 2`` times the mean,
    so ``sigma^2 = median / (ln 2 sum w^2)``. The median keeps leakage tails of strong
    tones from inflating the estimate. Records longer than 4 * 65536 samples use up to
    16 pieces of 65536 samples spread over the record (the cost stays bounded).
    Returns NaN when fewer than 8 bins remain (very short records); 0 for a noise-free
    record.
    """
    n = y.size
    seg_len = n if n <= 4 * NOISE_FFT_LEN else NOISE_FFT_LEN
    n_seg = min(n // seg_len, NOISE_SEGMENTS)
    starts = np.linspace(0, n - seg_len, n_seg).astype(np.int64)
    segs = np.stack([y[s : s + seg_len] for s in starts])
    window = make_window(window_name, seg_len)
    segs = (segs - segs.mean(axis=1, keepdims=True)) * window
    spec = np.abs(np.fft.rfft(segs, axis=1)) ** 2
    keep = np.ones(spec.shape[1], dtype=bool)
    guard = WINDOWS[window_name][1] + 2
    bins = theta * seg_len / (2 * math.pi) * np.arange(0, n_harm + 1)
    for centre in bins:
        lo = max(int(np.floor(centre - guard)), 0)
        hi = min(int(np.ceil(centre + guard)) + 1, spec.shape[1])
        keep[lo:hi] = False
    if seg_len % 2 == 0:
        keep[-1] = False  # the Nyquist bin of an even length is real: not exponential
    if keep.sum() * n_seg < 8:
        return math.nan
    return float(np.median(spec[:, keep]) / math.log(2.0) / float(window @ window))
