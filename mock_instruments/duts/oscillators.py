"""Oscillator loops: LC (capacitive-divider feedback), Wien bridge, RC phase shift.

Each is a gain stage with soft saturation (tanh) followed by a passive network; the loop
is broken at the stage input, where the generator drives it (channel 1) and the network
returns (channel 2). Every default value is invented for the simulator.

Each model computes its probe phasors from the circuit's own node equations (complex
impedances) and, separately, gives the same network as polynomials for the state-space
realisation; the tests check that the two agree and match the textbook frequencies.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from mock_instruments.duts import register_dut
from mock_instruments.duts.base import DUTModel, DUTParams
from mock_instruments.lti import Rational


# --- LC oscillator ------------------------------------------------------------------------
class LCParams(DUTParams):
    """LC oscillator loop (invented defaults: 22 uH, 680 pF, 2.2 nF, 2 kOhm, 3.3 mS)."""

    model: Literal["lc_oscillator"] = "lc_oscillator"
    inductance_h: float = Field(22e-6, gt=0)
    c1_f: float = Field(680e-12, gt=0)
    c2_f: float = Field(2.2e-9, gt=0)
    tank_resistance_ohm: float = Field(2000.0, gt=0)
    transconductance_s: float = Field(3.3e-3, gt=0)
    current_limit_a: float | None = Field(1e-3, gt=0)


@register_dut
class LCOscillator(DUTModel):
    """Transconductance stage into a C1-L-C2 pi tank, fed back from C2.

    The stage sinks ``i = I_max tanh(gm v / I_max)`` from node A (C1 and the tank loss
    R to ground); L joins A to node B (C2 to ground); node B returns to the stage input.
    With ``Y_A = 1/R + jwC1 + 1/(jwL + 1/(jwC2))`` and ``v_B = v_A / (1 - w^2 L C2)``:

        H(s) = -gm / ((1/R + s C1)(1 + s^2 L C2) + s C2)

    At ``w0^2 = (C1 + C2) / (L C1 C2)`` the reactive part of ``Y_A`` cancels and
    ``v_B / v_A = -C1/C2``, so ``H(w0) = gm R C1 / C2`` at 0 degrees (Colpitts form).
    """

    name = "lc_oscillator"
    description = "gain stage with tanh saturation into an LC tank with capacitive-divider feedback"
    Params = LCParams

    def resonance_hz(self) -> float:
        """Textbook frequency 1 / (2 pi sqrt(L C1 C2 / (C1 + C2)))."""
        p = self.params
        series_c = p.c1_f * p.c2_f / (p.c1_f + p.c2_f)
        return 1.0 / (2 * np.pi * np.sqrt(p.inductance_h * series_c))

    def stage_gain_and_limit(self) -> tuple[float, float | None]:
        return self.params.transconductance_s, self.params.current_limit_a

    def probe_transfer_functions(self) -> tuple[Rational, Rational]:
        p = self.params
        den = np.polymul([p.c1_f, 1.0 / p.tank_resistance_ohm], [p.inductance_h * p.c2_f, 0, 1])
        den = np.polyadd(den, [p.c2_f, 0.0])
        return Rational.constant(1.0), Rational(np.array([-p.transconductance_s]), den)

    def probe_phasors(self, frequency_hz) -> tuple[np.ndarray, np.ndarray]:
        p = self.params
        w = 2 * np.pi * np.asarray(frequency_hz, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            branch = 1j * w * p.inductance_h + 1 / (1j * w * p.c2_f)
            y_a = 1 / p.tank_resistance_ohm + 1j * w * p.c1_f + 1 / branch
            v_a = -p.transconductance_s / y_a
            v_b = v_a * (1 / (1j * w * p.c2_f)) / branch
        v_b = np.where(w == 0, v_a, v_b)
        return np.ones_like(v_b), v_b


# --- Wien bridge ----------------------------------------------------------------------------
class WienParams(DUTParams):
    """Wien-bridge loop (invented defaults: 15 kOhm, 10 nF, gain 3.3, 4 V limit)."""

    model: Literal["wien"] = "wien"
    resistance_ohm: float = Field(15e3, gt=0)
    capacitance_f: float = Field(10e-9, gt=0)
    gain: float = Field(3.3, gt=0)
    output_limit_v: float | None = Field(4.0, gt=0)


@register_dut
class WienBridge(DUTModel):
    """Non-inverting amplifier of gain K with soft limiting, RC series-parallel feedback.

    ``beta = Zp / (Zs + Zp)`` with ``Zs = R + 1/(sC)``, ``Zp = R || 1/(sC)``:
    ``beta(s) = sRC / ((sRC)^2 + 3 sRC + 1)``, 1/3 at 0 degrees at ``f0 = 1/(2 pi R C)``.
    """

    name = "wien"
    description = "Wien-bridge loop: amplifier of gain K with soft limiting, RC series-parallel"
    Params = WienParams

    def resonance_hz(self) -> float:
        """Textbook frequency 1 / (2 pi R C)."""
        return 1.0 / (2 * np.pi * self.params.resistance_ohm * self.params.capacitance_f)

    def stage_gain_and_limit(self) -> tuple[float, float | None]:
        return self.params.gain, self.params.output_limit_v

    def probe_transfer_functions(self) -> tuple[Rational, Rational]:
        p = self.params
        rc = p.resistance_ohm * p.capacitance_f
        return Rational.constant(1.0), Rational(np.array([p.gain * rc, 0.0]),
                                                np.array([rc * rc, 3 * rc, 1.0]))

    def probe_phasors(self, frequency_hz) -> tuple[np.ndarray, np.ndarray]:
        p = self.params
        w = 2 * np.pi * np.asarray(frequency_hz, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            z_series = p.resistance_ohm + 1 / (1j * w * p.capacitance_f)
            z_shunt = 1 / (1 / p.resistance_ohm + 1j * w * p.capacitance_f)
            beta = z_shunt / (z_series + z_shunt)
        beta = np.where(w == 0, 0.0, beta)
        return np.ones_like(beta), p.gain * beta


# --- RC phase shift -----------------------------------------------------------------------
class PhaseShiftParams(DUTParams):
    """RC phase-shift loop (invented defaults: 10 kOhm, 4.7 nF, gain 32, 5 V limit)."""

    model: Literal["phase_shift"] = "phase_shift"
    resistance_ohm: float = Field(10e3, gt=0)
    capacitance_f: float = Field(4.7e-9, gt=0)
    gain: float = Field(32.0, gt=0)
    output_limit_v: float | None = Field(5.0, gt=0)


def _ladder_abcd(z_series: np.ndarray, y_shunt: np.ndarray, sections: int) -> np.ndarray:
    """ABCD matrices (..., 2, 2) of ``sections`` series-Z / shunt-Y sections in cascade."""
    one = np.ones_like(z_series)
    series = np.stack([np.stack([one, z_series], -1), np.stack([0 * one, one], -1)], -2)
    shunt = np.stack([np.stack([one, 0 * one], -1), np.stack([y_shunt, one], -1)], -2)
    section = series @ shunt
    total = np.broadcast_to(np.eye(2, dtype=complex), section.shape).copy()
    for _ in range(sections):
        total = total @ section
    return total


@register_dut
class PhaseShift(DUTModel):
    """Inverting amplifier (gain -K, soft limiting) and three RC low-pass sections.

    Unloaded ladder of series R and shunt C:
    ``beta(s) = 1 / ((sRC)^3 + 5 (sRC)^2 + 6 sRC + 1)``, which is -1/29 at
    ``f = sqrt(6) / (2 pi R C)``; with the inversion, ``H = -K beta`` crosses 0 degrees
    there and needs K >= 29. (The low-pass ladder is used because it is strictly
    proper; the high-pass ladder has the same 29 at 1/(2 pi sqrt(6) R C).)
    """

    name = "phase_shift"
    description = "three-section RC phase-shift loop with an inverting amplifier (critical gain 29)"
    Params = PhaseShiftParams

    def resonance_hz(self) -> float:
        """Textbook frequency sqrt(6) / (2 pi R C) of the low-pass ladder."""
        return np.sqrt(6) / (2 * np.pi * self.params.resistance_ohm * self.params.capacitance_f)

    def stage_gain_and_limit(self) -> tuple[float, float | None]:
        return -self.params.gain, self.params.output_limit_v

    def probe_transfer_functions(self) -> tuple[Rational, Rational]:
        p = self.params
        rc = p.resistance_ohm * p.capacitance_f
        return Rational.constant(1.0), Rational(np.array([-p.gain]),
                                                np.array([rc**3, 5 * rc**2, 6 * rc, 1.0]))

    def probe_phasors(self, frequency_hz) -> tuple[np.ndarray, np.ndarray]:
        p = self.params
        w = 2 * np.pi * np.atleast_1d(np.asarray(frequency_hz, dtype=float))
        z = np.full(w.shape, p.resistance_ohm, dtype=complex)
        abcd = _ladder_abcd(z, 1j * w * p.capacitance_f, 3)
        beta = 1 / abcd[..., 0, 0]
        shape = np.shape(frequency_hz)
        return np.ones(shape, dtype=complex), (-p.gain * beta).reshape(shape)
