"""Seeded random feedback loops for the margin checks (shared by tests and benchmarks).

A stable-ish loop of order up to 6: an optional integrator, up to two lightly damped
pairs (zeta 0.03..0.7), real poles, up to two real zeros; its gain is scaled so the
crossover falls near w = 1 rad/s. python-control computes the reference margins.
"""

from __future__ import annotations

import control
import numpy as np


def random_loop(rng: np.random.Generator) -> control.TransferFunction:
    """One random loop L(s) (negative feedback), w in rad/s around 1."""
    num, den, order = np.array([1.0]), np.array([1.0]), 0
    if rng.random() < 0.6:
        den, order = np.polymul(den, [1.0, 0.0]), 1
    for _ in range(rng.integers(0, 3)):
        wn = 10 ** rng.uniform(-0.5, 1.0)
        zeta = 10 ** rng.uniform(np.log10(0.03), np.log10(0.7))
        den, order = np.polymul(den, [1.0, 2 * zeta * wn, wn * wn]), order + 2
    target = rng.integers(max(order, 1), 7)
    while order < target:
        pole = 10 ** rng.uniform(-1, 1.5)
        den, order = np.polymul(den, [1 / pole, 1.0]), order + 1
    for _ in range(min(rng.integers(0, max(1, order - 1)), 2)):
        zero = 10 ** rng.uniform(-1, 1)
        num = np.polymul(num, [1 / zero, 1.0])
    system = control.tf(num, den)
    return system * (10 ** rng.uniform(-0.5, 0.5) / abs(system(1j)))
