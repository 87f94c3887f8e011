"""Sums of a record against complex exponentials, fast and without big matrices.

Every estimator in :mod:`loopwright.dsp` reduces a record ``y[n]`` to a handful of
sums ``sum_n u^p y[n] exp(-j theta n)`` (``u = n - (N-1)/2``, ``p`` = 0 or 1) and
needs the matching deterministic sums ``sum_n u^p exp(j phi n)`` (``p`` up to 2) to
build the normal equations of a least-squares fit.

Both are computed by splitting the sample index as ``n = k M + m`` (``M`` about
``sqrt(N)``): ``exp(-j theta n) = exp(-j theta M k) exp(-j theta m)``, so a record
sum is one real matrix product ``y.reshape(K, M) @ [cos, sin](theta m)`` (read once,
memory bound) followed by a short sum over ``k``; a deterministic sum factors into a
product of two short sums. Nothing of length ``N`` is ever allocated, and only
``O(sqrt(N))`` sines and cosines are evaluated.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

__all__ = ["block_split", "data_sums", "tone_sums"]


def block_split(n_samples: int) -> tuple[int, int]:
    """Block length ``M`` and number of full blocks ``K`` for ``n_samples``."""
    m = int(np.clip(round(np.sqrt(n_samples)), 8, 8192))
    m = min(m, n_samples)
    return m, n_samples // m


def tone_sums(phi: NDArray[np.float64], n_samples: int, max_power: int = 2) -> NDArray:
    """``sum_{n=0}^{N-1} u^p exp(j phi n)`` for ``p = 0..max_power``, ``u = n - (N-1)/2``.

    Parameters
    ----------
    phi
        Angular frequencies in radians per sample, any shape.
    n_samples
        Record length ``N``.
    max_power
        Highest power of ``u`` (0, 1 or 2).

    Returns
    -------
    ndarray of complex, shape ``(max_power + 1,) + phi.shape``.
    """
    phi = np.asarray(phi, dtype=np.float64)
    flat = phi.reshape(-1, 1)
    m_len, k_len = block_split(n_samples)
    center = (n_samples - 1) / 2.0
    m = np.arange(m_len, dtype=np.float64)
    k = np.arange(k_len, dtype=np.float64)
    v = k * m_len - center  # u at the start of each block
    zm = np.exp(1j * flat * m)  # (P, M)
    zk = np.exp(1j * flat * (k * m_len))  # (P, K)
    a0 = zm.sum(axis=1)
    b0 = zk.sum(axis=1)
    out = np.empty((max_power + 1, flat.shape[0]), dtype=np.complex128)
    out[0] = a0 * b0
    if max_power >= 1:
        a1 = (zm * m).sum(axis=1)
        b1 = (zk * v).sum(axis=1)
        out[1] = b1 * a0 + b0 * a1
    if max_power >= 2:
        a2 = (zm * (m * m)).sum(axis=1)
        b2 = (zk * (v * v)).sum(axis=1)
        out[2] = b2 * a0 + 2.0 * b1 * a1 + b0 * a2
    tail_start = k_len * m_len
    if tail_start < n_samples:
        n_tail = np.arange(tail_start, n_samples, dtype=np.float64)
        z_tail = np.exp(1j * flat * n_tail)
        u_tail = n_tail - center
        for p in range(max_power + 1):
            out[p] += (z_tail * u_tail**p).sum(axis=1)
    return out.reshape((max_power + 1, *phi.shape))


def data_sums(
    y: NDArray[np.float64], theta: NDArray[np.float64], with_u: bool = False
) -> tuple[NDArray, NDArray | None]:
    """``sum_n y[..., n] exp(-j theta n)`` and, optionally, the same weighted by ``u``.

    Parameters
    ----------
    y
        Real records, shape ``(..., N)``, float64. Not modified.
    theta
        Angular frequencies in radians per sample, shape ``(F,)``.
    with_u
        Also return ``sum_n u y exp(-j theta n)`` with ``u = n - (N-1)/2``.

    Returns
    -------
    s0, s1
        Complex arrays of shape ``(..., F)``; ``s1`` is None unless ``with_u``.
    """
    theta = np.atleast_1d(np.asarray(theta, dtype=np.float64))
    n_samples = y.shape[-1]
    lead = y.shape[:-1]
    y2 = y.reshape(-1, n_samples)
    n_rec = y2.shape[0]
    m_len, k_len = block_split(n_samples)
    center = (n_samples - 1) / 2.0
    n_freq = theta.size
    m = np.arange(m_len, dtype=np.float64)
    arg = np.outer(m, theta)  # (M, F)
    cols = [np.cos(arg), np.sin(arg)]
    if with_u:
        cols += [cols[0] * m[:, None], cols[1] * m[:, None]]
    basis = np.concatenate(cols, axis=1)  # (M, 2F or 4F)
    main = y2[:, : k_len * m_len].reshape(n_rec * k_len, m_len)
    prod = (main @ basis).reshape(n_rec, k_len, -1)
    r0 = prod[..., :n_freq] - 1j * prod[..., n_freq : 2 * n_freq]  # (R, K, F)
    k = np.arange(k_len, dtype=np.float64)
    zk = np.exp(-1j * np.outer(k * m_len, theta))  # (K, F)
    s0 = np.einsum("rkf,kf->rf", r0, zk)
    s1 = None
    if with_u:
        r1 = prod[..., 2 * n_freq : 3 * n_freq] - 1j * prod[..., 3 * n_freq :]
        v = k * m_len - center
        s1 = np.einsum("rkf,kf->rf", r0, zk * v[:, None]) + np.einsum("rkf,kf->rf", r1, zk)
    tail_start = k_len * m_len
    if tail_start < n_samples:
        n_tail = np.arange(tail_start, n_samples, dtype=np.float64)
        z_tail = np.exp(-1j * np.outer(n_tail, theta))  # (T, F)
        y_tail = y2[:, tail_start:]
        s0 = s0 + y_tail @ z_tail
        if with_u:
            s1 = s1 + (y_tail * (n_tail - center)) @ z_tail
    s0 = s0.reshape((*lead, n_freq))
    if s1 is not None:
        s1 = s1.reshape((*lead, n_freq))
    return s0, s1
