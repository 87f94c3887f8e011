"""Voltage-mode buck regulator loop (type-III compensation) measured by voltage injection.

The injection source ``v_z`` (the generator, through an isolating transformer) sits in
series in the loop between a source of impedance Z1 (the converter output, seen at the
injection point) and a load Z2 (the divider/compensator input). Channel 1 probes
``v_x``, the side that drives into the loop input (Z2); channel 2 probes ``v_y``, the
side returning from the loop output (Z1), so ``v_x = v_y + v_z``.

The forward path from the sensed voltage ``v_x`` to the converter's open-circuit
output is ``e = -G v_x`` (the error amplifier inverts) with

    G(s) = k_div * Gc(s) * (Vin / Vramp) * Gf(s)
    Gc(s) = wi (1 + s/wz1)(1 + s/wz2) / (s (1 + s/wp1)(1 + s/wp2))      (type III)
    Gf(s) = R(1 + s C Resr) / (s L (1 + s C (R + Resr)) + R (1 + s C Resr))

The loop's own gain (no injection) is ``T = G Z2 / (Z1 + Z2)``, so the project's H is
``-T``. Solving the series loop (``i = (e + v_z)/(Z1 + Z2)``, ``v_x = i Z2``) gives

    v_x / v_z = Z2 / (Z1 + Z2 + G Z2),      v_y = v_x - v_z
    measured H = v_y / v_x = -T (1 + Z1/Z2) - Z1/Z2

which is Middlebrook's (1975) injection result: the measurement is right only where
``|Z1/Z2| << 1`` and ``<< |T|``. Every default value is invented for the simulator
(12 V in, 1.8 V ramp, 6.8 uH, 220 uF, 8 mOhm ESR, 0.6 Ohm load, crossover near 30 kHz;
injection at a good point: 5 mOhm + 20 nH source into 10 kOhm || 22 pF).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from mock_instruments.duts import register_dut
from mock_instruments.duts.base import DUTModel, DUTParams
from mock_instruments.lti import Rational, poly_add


class BuckParams(DUTParams):
    """Buck loop and injection point parameters (invented defaults; see module doc)."""

    model: Literal["buck_injection"] = "buck_injection"
    input_voltage_v: float = Field(12.0, gt=0)
    ramp_v: float = Field(1.8, gt=0)
    inductance_h: float = Field(6.8e-6, gt=0)
    capacitance_f: float = Field(220e-6, gt=0)
    esr_ohm: float = Field(0.008, ge=0)
    load_ohm: float = Field(0.6, gt=0)
    divider_ratio: float = Field(0.4, gt=0, le=1)
    integrator_hz: float = Field(6400.0, gt=0)
    zero1_hz: float = Field(2600.0, gt=0)
    zero2_hz: float = Field(3600.0, gt=0)
    pole1_hz: float = Field(90e3, gt=0)
    pole2_hz: float = Field(200e3, gt=0)
    source_resistance_ohm: float = Field(0.005, ge=0)
    source_inductance_h: float = Field(20e-9, ge=0)
    load_resistance_ohm: float = Field(10e3, gt=0)
    load_capacitance_f: float = Field(22e-12, ge=0)


@register_dut
class BuckInjection(DUTModel):
    """Voltage-mode buck with type-III compensation, measured by series voltage injection."""

    name = "buck_injection"
    description = ("voltage-mode buck loop, type-III compensation, series voltage injection "
                   "with source/load impedances")
    Params = BuckParams

    # --- polynomial pieces ---------------------------------------------------------------
    def _forward(self) -> tuple[np.ndarray, np.ndarray]:
        """Numerator and denominator of G(s)."""
        p = self.params
        wz1, wz2 = 2 * np.pi * p.zero1_hz, 2 * np.pi * p.zero2_hz
        wp1, wp2 = 2 * np.pi * p.pole1_hz, 2 * np.pi * p.pole2_hz
        wi = 2 * np.pi * p.integrator_hz
        num_c = wi * np.polymul([1 / wz1, 1], [1 / wz2, 1])
        den_c = np.polymul([1, 0], np.polymul([1 / wp1, 1], [1 / wp2, 1]))
        R, C, L, esr = p.load_ohm, p.capacitance_f, p.inductance_h, p.esr_ohm
        num_f = R * np.array([C * esr, 1.0])
        den_f = poly_add(np.polymul([L, 0], [C * (R + esr), 1]), num_f)
        gain = p.divider_ratio * p.input_voltage_v / p.ramp_v
        return gain * np.polymul(num_c, num_f), np.polymul(den_c, den_f)

    def _impedances(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Z1 = N1/D1 (R1 + s L1) and Z2 = N2/D2 (R2 || C2) as polynomials."""
        p = self.params
        n1 = np.array([p.source_inductance_h, p.source_resistance_ohm])
        d1 = np.array([1.0])
        n2 = np.array([p.load_resistance_ohm])
        d2 = np.array([p.load_resistance_ohm * p.load_capacitance_f, 1.0])
        return n1, d1, n2, d2

    def probe_transfer_functions(self) -> tuple[Rational, Rational]:
        ng, dg = self._forward()
        n1, d1, n2, d2 = self._impedances()
        num_x = np.polymul(n2, np.polymul(d1, dg))
        den = poly_add(poly_add(np.polymul(n1, np.polymul(d2, dg)), num_x),
                       np.polymul(ng, np.polymul(n2, d1)))
        return Rational(num_x, den), Rational(poly_add(num_x, -den), den)

    def true_transfer_function(self) -> Rational:
        """``-T(s) = -G Z2 / (Z1 + Z2)``: the loop's own H, free of injection error."""
        ng, dg = self._forward()
        n1, d1, n2, d2 = self._impedances()
        return Rational(-np.polymul(ng, np.polymul(n2, d1)),
                        np.polymul(dg, poly_add(np.polymul(n1, d2), np.polymul(n2, d1))))

    # --- circuit formulas (complex numbers, independent of the polynomials) ----------------
    def forward_gain(self, frequency_hz) -> np.ndarray:
        """G(jw): sensed voltage to open-circuit converter output (inversion excluded)."""
        p = self.params
        s = 2j * np.pi * np.asarray(frequency_hz, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            gc = (2 * np.pi * p.integrator_hz * (1 + s / (2 * np.pi * p.zero1_hz))
                  * (1 + s / (2 * np.pi * p.zero2_hz))
                  / (s * (1 + s / (2 * np.pi * p.pole1_hz)) * (1 + s / (2 * np.pi * p.pole2_hz))))
            z_cap = p.esr_ohm + 1 / (s * p.capacitance_f)
            z_out = z_cap * p.load_ohm / (z_cap + p.load_ohm)
            gf = z_out / (s * p.inductance_h + z_out)
        return p.divider_ratio * gc * p.input_voltage_v / p.ramp_v * gf

    def injection_impedances(self, frequency_hz) -> tuple[np.ndarray, np.ndarray]:
        """Z1 (source side) and Z2 (load side) at the injection point."""
        p = self.params
        s = 2j * np.pi * np.asarray(frequency_hz, dtype=float)
        z1 = p.source_resistance_ohm + s * p.source_inductance_h
        z2 = 1 / (1 / p.load_resistance_ohm + s * p.load_capacitance_f)
        return z1, z2

    def true_loop_response(self, frequency_hz) -> np.ndarray:
        """The loop's own H = -T = -G Z2/(Z1 + Z2), what an ideal injection would measure."""
        z1, z2 = self.injection_impedances(frequency_hz)
        return -self.forward_gain(frequency_hz) * z2 / (z1 + z2)

    def probe_phasors(self, frequency_hz) -> tuple[np.ndarray, np.ndarray]:
        z1, z2 = self.injection_impedances(frequency_hz)
        g = self.forward_gain(frequency_hz)
        v_x = z2 / (z1 + z2 + g * z2)
        return v_x, v_x - 1.0

    @property
    def stimulus_on_channel1(self) -> bool:
        return False
