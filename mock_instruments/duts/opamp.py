"""Op-amp voltage follower driving a capacitive load.

The open-loop gain has two poles, ``A(s) = A0 / ((1 + s/w1)(1 + s/w2))``; the output
resistance ``Ro`` into ``C_L`` adds a third pole at ``1/(Ro C_L)``, which eats phase
margin (a real-world cause of ringing). The loop is broken at the inverting input: the
generator drives it (channel 1) and the output returns (channel 2); the follower's
inversion is included, so ``H(s) = -A(s) / (1 + s Ro C_L)``. Invented defaults: 100 dB,
poles at 20 Hz and 8 MHz (2 MHz gain-bandwidth), 60 Ohm into 1 nF, no output limit
(``output_limit_v`` adds a soft output swing limit).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from mock_instruments.duts import register_dut
from mock_instruments.duts.base import DUTModel, DUTParams
from mock_instruments.lti import Rational


class OpampParams(DUTParams):
    """Follower with capacitive load (invented defaults; see module doc)."""

    model: Literal["opamp_capload"] = "opamp_capload"
    dc_gain: float = Field(1e5, gt=0)
    pole1_hz: float = Field(20.0, gt=0)
    pole2_hz: float = Field(8e6, gt=0)
    output_resistance_ohm: float = Field(60.0, ge=0)
    load_capacitance_f: float = Field(1e-9, ge=0)
    output_limit_v: float | None = Field(None, gt=0)


@register_dut
class OpampCapLoad(DUTModel):
    """Voltage follower: two-pole op-amp, output resistance into a load capacitor."""

    name = "opamp_capload"
    description = "op-amp voltage follower with a capacitive load (two-pole gain plus Ro*CL pole)"
    Params = OpampParams

    def probe_transfer_functions(self) -> tuple[Rational, Rational]:
        p = self.params
        w1, w2 = 2 * np.pi * p.pole1_hz, 2 * np.pi * p.pole2_hz
        den = np.polymul([1 / w1, 1], [1 / w2, 1])
        den = np.polymul(den, [p.output_resistance_ohm * p.load_capacitance_f, 1])
        return Rational.constant(1.0), Rational(np.array([-p.dc_gain]), den)

    def probe_phasors(self, frequency_hz) -> tuple[np.ndarray, np.ndarray]:
        p = self.params
        s = 2j * np.pi * np.asarray(frequency_hz, dtype=float)
        a = p.dc_gain / ((1 + s / (2 * np.pi * p.pole1_hz)) * (1 + s / (2 * np.pi * p.pole2_hz)))
        load = 1 / (1 + s * p.output_resistance_ohm * p.load_capacitance_f)
        return np.ones_like(a), -a * load

    def stage_gain_and_limit(self) -> tuple[float, float | None]:
        # The gain stage is the whole open-loop gain; its output swings softly to
        # +- output_limit_v (None: linear). With a limit, a broken-loop measurement
        # saturates unless the stimulus is tiny, as on a real op-amp.
        return -self.params.dc_gain, self.params.output_limit_v
