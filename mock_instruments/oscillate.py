"""Closed-loop runs of a DUT: the loop output feeds its own input, integrated in time.

The loop is ``dx/dt = A x + B w``, ``v = C x``, ``w = stage(v)`` (see
:mod:`mock_instruments.duts.base`). It starts from a little noise; an oscillator's
amplitude then grows until the stage's soft saturation holds it, so frequency and
amplitude come out of the integration, not from a formula.

The linear network is stepped exactly (matrix exponential of the augmented system)
and only the stage's output ``w`` is approximated, as the parabola through the
previous, present and next values (third order, implicit in the next value, which a
scalar Newton iteration on the loop voltage finds). Because the network's own dynamics
are exact, the step only has to follow ``w``: 64 steps per period of the fastest
closed-loop mode keep frequency errors below 1e-4 and amplitude errors near 1e-4
against scipy's DOP853 at tight tolerances (tests/test_closed_loop.py). Samples
between steps come from cubic Hermite interpolation (values and slopes at the steps).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import scipy.linalg

from loopwright.errors import InputError
from mock_instruments.duts.base import LoopSystem

#: Most integration steps one acquisition may take (beyond: ask for a shorter record).
MAX_STEPS = 4_000_000
#: Soft limit (stage-output units) given to a linear stage whose closed loop is unstable:
#: a real amplifier meets its supply rail; without one the record would overflow.
RAIL_LIMIT = 15.0


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

    Notes
    -----
    A linear stage (no limit) with a stable closed loop is solved exactly (the closed
    loop's matrix exponential), so stiff loops such as the buck regulator cost nothing
    to run; an unstable linear one gets the soft limit :data:`RAIL_LIMIT`.
    """

    def __init__(self, system: LoopSystem, rng: np.random.Generator, t_start_s: float, *,
                 steps_per_cycle: int = 64, start_noise_v: float = 1e-5,
                 max_advance_cycles: float = 400.0) -> None:
        net = system.network
        self._A = net.A
        self._B = net.B
        self._C = net.C
        closed = net.A + system.gain * np.outer(net.B, net.C)
        closed_eigs = np.linalg.eigvals(closed)
        self.exact = system.limit is None and bool(np.all(closed_eigs.real < 0))
        if system.limit is None and not self.exact:
            system = replace(system, limit=RAIL_LIMIT)
        self.system = system
        self._closed = closed
        fastest = float(np.max(np.abs(closed_eigs))) if closed_eigs.size else 1.0
        self.step_s = 2 * np.pi / (steps_per_cycle * fastest)
        oscillatory = np.abs(closed_eigs.imag[np.abs(closed_eigs.imag) > 0])
        slowest = (float(np.min(oscillatory)) if oscillatory.size
                   else float(np.min(np.abs(closed_eigs))))
        self.max_advance_s = max_advance_cycles * 2 * np.pi / max(slowest, 1e-30)
        x = rng.normal(0.0, 1.0, net.order)
        level = abs(float(self._C @ x)) or 1.0
        self.x = x * start_noise_v / level
        self.t_s = float(t_start_s)
        self._discrete: dict[float, tuple] = {}
        self._w_prev: float | None = None    # stage output one step back (for the hold)

    # --- integration ---------------------------------------------------------------------
    def _hold_matrices(self, h: float) -> tuple:
        """Exact step ``h`` of the network for a polynomial ``w`` (cached per ``h``).

        With ``u = tau / h``, ``w = w0 + w1 u + w2 u^2 / 2`` over a step gives
        ``x(h) = phi x0 + g0 w0 + g1 w1 + g2 w2`` (blocks of one augmented expm).
        """
        key = round(h, 18)
        if key not in self._discrete:
            n = self._A.shape[0]
            big = np.zeros((n + 3, n + 3))
            big[:n, :n] = self._A * h
            big[:n, n] = self._B * h
            big[n, n + 1] = 1.0
            big[n + 1, n + 2] = 1.0
            e = scipy.linalg.expm(big)
            self._discrete = {key: (e[:n, :n], e[:n, n], e[:n, n + 1], e[:n, n + 2])}
        return self._discrete[key]

    def _steps(self, x: np.ndarray, count: int, h: float) -> tuple[np.ndarray, np.ndarray]:
        """States and stage outputs at ``count`` + 1 points spaced ``h`` (first = ``x``).

        ``w`` across a step is the parabola through the previous, present and next stage
        outputs (the very first step of the run uses a straight line); the next one is
        implicit and solved by Newton's method on the loop voltage. ``x`` must be the
        run's present state: the previous stage output is carried over between calls.
        """
        phi, g0, g1, g2 = self._hold_matrices(h)
        # Line through (w0, w_next):  x1 = phi x0 + (g0 - g1) w0 + g1 w_next.
        line_old, line_new = g0 - g1, g1
        # Parabola through (w_prev, w0, w_next) at u = -1, 0, 1.
        par_prev, par_old, par_new = g2 - g1 / 2, g0 - 2 * g2, g1 / 2 + g2
        C = self._C
        c_line, c_par = float(C @ line_new), float(C @ par_new)
        gain, limit = self.system.gain, self.system.limit
        states = np.empty((count + 1, x.size))
        stage_out = np.empty(count + 1)
        states[0] = x
        y = float(C @ x)
        w = limit * math.tanh(gain * y / limit) if limit is not None else gain * y
        stage_out[0] = w
        w_prev = self._w_prev
        for i in range(count):
            if w_prev is None:
                partial = phi @ x + line_old * w
                g_new, c_new = line_new, c_line
            else:
                partial = phi @ x + par_old * w + par_prev * w_prev
                g_new, c_new = par_new, c_par
            base = float(C @ partial)
            w_prev = w
            if limit is None:
                w = gain * base / (1.0 - c_new * gain)
            else:
                # Solve y = base + c_new L tanh(K y / L) for y (Newton from y_prev).
                for _ in range(4):
                    th = math.tanh(gain * y / limit)
                    residual = y - base - c_new * limit * th
                    slope = 1.0 - c_new * gain * (1.0 - th * th)
                    y -= residual / slope
                w = limit * math.tanh(gain * y / limit)
            x = partial + g_new * w
            y = float(C @ x)
            states[i + 1] = x
            stage_out[i + 1] = w
        if count:
            self._w_prev = w_prev
        return states, stage_out

    def advance_to(self, t_s: float) -> None:
        """Run the loop up to the last step at or before ``t_s``.

        The state's time stays on the step grid, so consecutive records continue one
        trajectory. A gap longer than ``max_advance_s`` is integrated for that long
        and the rest is skipped (the loop's time jumps to ``t_s``).
        """
        gap = t_s - self.t_s
        if gap <= 0:
            return
        if self.exact:
            self.x = scipy.linalg.expm(self._closed * gap) @ self.x
            self.t_s = float(t_s)
            return
        span = min(gap, self.max_advance_s)
        # a stiff loop has a tiny step: integrate at most MAX_STEPS, let time jump after
        count = min(int(span // self.step_s), MAX_STEPS)
        if count:
            self.x = self._steps(self.x, count, self.step_s)[0][-1]
        jumped = gap > self.max_advance_s or count == MAX_STEPS
        self.t_s = float(t_s) if jumped else self.t_s + count * self.step_s

    def sample(self, times_s: list[np.ndarray]) -> list[np.ndarray]:
        """Loop voltage at each array of times (all at or after the loop's time).

        The grid starts at the loop's present step (at or before the first time) and
        the state ends at the first step at or after the last sample time, so the next
        call continues from there.
        """
        t_min = min(float(t.min()) for t in times_s)
        t_max = max(float(t.max()) for t in times_s)
        self.advance_to(t_min)
        if self.exact:
            return self._sample_exact(times_s, t_max)
        span = t_max - self.t_s
        count = max(1, int(np.ceil(span / self.step_s)))
        if count > MAX_STEPS:
            raise InputError(
                f"a closed-loop record of {span:.3g} s needs {count} integration steps "
                f"(limit {MAX_STEPS}); use fewer cycles per record")
        h = self.step_s
        states, stage_out = self._steps(self.x, count, h)
        grid_t = self.t_s + h * np.arange(count + 1)
        values = states @ self._C
        slopes = (states @ self._A.T + np.multiply.outer(stage_out, self._B)) @ self._C
        self.x = states[-1]
        self.t_s = float(grid_t[-1])
        return [_hermite(grid_t, values, slopes, t) for t in times_s]

    def _sample_exact(self, times_s: list[np.ndarray], t_max: float) -> list[np.ndarray]:
        """Stable linear loop: ``C expm(A_cl (t - t0)) x`` at every time."""
        out = [_modal(self._closed, self._C, self.x, t - self.t_s) for t in times_s]
        self.x = scipy.linalg.expm(self._closed * (t_max - self.t_s)) @ self.x
        self.t_s = float(t_max)
        return out


def _modal(a: np.ndarray, c: np.ndarray, x0: np.ndarray, dt: np.ndarray) -> np.ndarray:
    """``c expm(a dt) x0`` for many ``dt``: modal sum, or stepping when not diagonalisable."""
    eigvals, vecs = np.linalg.eig(a)
    if np.linalg.cond(vecs) < 1e8:
        weights = (c @ vecs) * np.linalg.solve(vecs, x0.astype(complex))
        return (np.exp(np.multiply.outer(dt, eigvals)) @ weights).real
    # Not diagonalisable: step along the sorted times, with one matrix exponential for a
    # uniformly spaced record.
    order = np.argsort(dt)
    sorted_dt = dt[order]
    steps = np.diff(sorted_dt)
    uniform = steps.size == 0 or np.allclose(steps, steps.mean(), rtol=1e-9, atol=0)
    phi = scipy.linalg.expm(a * steps.mean()) if uniform and steps.size else None
    out = np.empty(dt.shape)
    x = scipy.linalg.expm(a * sorted_dt[0]) @ x0
    out[order[0]] = c @ x
    for k in range(1, sorted_dt.size):
        x = (phi if phi is not None else scipy.linalg.expm(a * steps[k - 1])) @ x
        out[order[k]] = c @ x
    return out


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
