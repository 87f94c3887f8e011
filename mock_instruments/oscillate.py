"""Closed-loop runs of a DUT: the loop output feeds its own input, integrated in time.

The loop is ``dx/dt = A x + B w``, ``v = C x``, ``w = stage(v)`` (see
:mod:`mock_instruments.duts.base`). It starts from a little noise; an oscillator's
amplitude then grows until the stage's soft saturation holds it, so frequency and
amplitude come out of the integration, not from a formula. A fixed-step classic
Runge-Kutta (4th order) with ``steps_per_cycle`` steps per period of the fastest mode
keeps the phase error far below the 2 % the tests ask for; samples between steps come
from cubic Hermite interpolation (values and slopes at the steps).
"""

from __future__ import annotations

import numpy as np

from loopwright.errors import InputError
from mock_instruments.duts.base import LoopSystem

#: Most integration steps one acquisition may take (beyond: ask for a shorter record).
MAX_STEPS = 4_000_000


class ClosedLoopRun:
    """The running state of a closed loop.

    Parameters
    ----------
    system
        The loop (network realisation, stage gain and limit).
    rng
        Random source for the start-up noise.
    t_start_s
        Bench time at which the loop was closed.
    steps_per_cycle
        Integration steps per period of the fastest mode.
    start_noise_v
        Rms of the loop voltage at the start (the noise the oscillation grows from).
    max_advance_cycles
        Most periods of the slowest oscillatory mode integrated between two acquisitions;
        beyond that the loop's time jumps (a free-running loop's phase is arbitrary anyway).
    """

    def __init__(self, system: LoopSystem, rng: np.random.Generator, t_start_s: float, *,
                 steps_per_cycle: int = 40, start_noise_v: float = 1e-5,
                 max_advance_cycles: float = 400.0) -> None:
        self.system = system
        net = system.network
        self._A = net.A
        self._B = net.B
        self._C = net.C
        closed = net.A + system.gain * np.outer(net.B, net.C)
        eigs = np.concatenate([np.linalg.eigvals(net.A), np.linalg.eigvals(closed)])
        fastest = float(np.max(np.abs(eigs))) if eigs.size else 1.0
        self.step_s = 2 * np.pi / (steps_per_cycle * fastest)
        oscillatory = np.abs(eigs.imag[np.abs(eigs.imag) > 0])
        slowest = float(np.min(oscillatory)) if oscillatory.size else float(np.min(np.abs(eigs)))
        self.max_advance_s = max_advance_cycles * 2 * np.pi / max(slowest, 1e-30)
        x = rng.normal(0.0, 1.0, net.order)
        level = abs(float(self._C @ x)) or 1.0
        self.x = x * start_noise_v / level
        self.t_s = float(t_start_s)

    # --- integration ---------------------------------------------------------------------
    def _derivative(self, x: np.ndarray) -> np.ndarray:
        """dx/dt for states ``x`` (last axis = state)."""
        w = self.system.stage(x @ self._C)
        return x @ self._A.T + np.multiply.outer(w, self._B)

    def _steps(self, x: np.ndarray, count: int, h: float) -> np.ndarray:
        """States at ``count`` + 1 points spaced ``h`` (first = ``x``)."""
        out = np.empty((count + 1, x.size))
        out[0] = x
        f = self._derivative
        for i in range(count):
            k1 = f(x)
            k2 = f(x + 0.5 * h * k1)
            k3 = f(x + 0.5 * h * k2)
            k4 = f(x + h * k3)
            x = x + (h / 6.0) * (k1 + 2 * k2 + 2 * k3 + k4)
            out[i + 1] = x
        return out

    def advance_to(self, t_s: float) -> None:
        """Run the loop up to ``t_s`` (at most ``max_advance_s`` of it is integrated)."""
        gap = t_s - self.t_s
        if gap <= 0:
            return
        span = min(gap, self.max_advance_s)
        count = int(np.ceil(span / self.step_s))
        self.x = self._steps(self.x, count, span / count)[-1]
        self.t_s = float(t_s)

    def sample(self, times_s: list[np.ndarray]) -> list[np.ndarray]:
        """Loop voltage at each array of times (ascending; all at or after the loop's time).

        The state ends at the last sample time, so the next call continues from there.
        """
        t_min = min(float(t.min()) for t in times_s)
        t_max = max(float(t.max()) for t in times_s)
        self.advance_to(t_min)
        span = t_max - self.t_s
        count = max(1, int(np.ceil(span / self.step_s)))
        if count > MAX_STEPS:
            raise InputError(
                f"a closed-loop record of {span:.3g} s needs {count} integration steps "
                f"(limit {MAX_STEPS}); use fewer cycles per record")
        h = span / count if span > 0 else self.step_s
        states = self._steps(self.x, count, h)
        grid_t = self.t_s + h * np.arange(count + 1)
        values = states @ self._C
        slopes = self._derivative(states) @ self._C
        self.x = states[-1]
        self.t_s = float(grid_t[-1])
        return [_hermite(grid_t, values, slopes, t) for t in times_s]


def _hermite(grid_t: np.ndarray, values: np.ndarray, slopes: np.ndarray,
             t: np.ndarray) -> np.ndarray:
    """Cubic Hermite interpolation on a uniform grid."""
    h = grid_t[1] - grid_t[0]
    idx = np.clip(((t - grid_t[0]) / h).astype(int), 0, grid_t.size - 2)
    u = (t - grid_t[idx]) / h
    u2 = u * u
    u3 = u2 * u
    h00 = 2 * u3 - 3 * u2 + 1
    h10 = u3 - 2 * u2 + u
    h01 = -2 * u3 + 3 * u2
    h11 = u3 - u2
    return (h00 * values[idx] + h10 * h * slopes[idx] + h01 * values[idx + 1]
            + h11 * h * slopes[idx + 1])
