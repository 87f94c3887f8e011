"""A DUT given directly as a rational transfer function, with an optional delay.

The generator drives the loop input (the loop is broken there); channel 1 sees the
stimulus, channel 2 the returned signal. Give either

- ``poles_hz`` and ``zeros_hz`` (roots of the s-plane divided by 2 pi, so a stable
  real pole at 3 kHz is ``-3000``; a complex root is written as a string such as
  ``"-20000+15000j"``, its conjugate is added when missing) with one of ``gain`` (the
  factor k of ``k * prod(s - z) / prod(s - p)`` with s in rad/s, as scipy.signal's zpk
  form) or ``dc_gain`` (H at 0 Hz); or
- ``numerator`` and ``denominator``: polynomial coefficients in s (rad/s), highest
  power first (scipy.signal.freqs order).

The default (invented for the simulator) is a third-order loop with a 3 kHz real pole
and a 20 kHz +- j15 kHz pair, H(0) = -5 (a negative-feedback loop, inversion included).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field, field_validator, model_validator

from mock_instruments.duts import register_dut
from mock_instruments.duts.base import DUTModel, DUTParams
from mock_instruments.lti import Rational

Root = float | str


def _parse_root(value: Root) -> complex:
    if isinstance(value, str):
        try:
            root = complex(value.replace(" ", "").replace("i", "j"))
        except ValueError as exc:
            raise ValueError(f"not a number or a complex number like '-100+2000j': {value!r}") \
                from exc
    else:
        root = complex(value)
    if not (np.isfinite(root.real) and np.isfinite(root.imag)):
        raise ValueError(f"a root must be finite, got {value!r}")
    return root


def _complete_pairs(roots: list[complex]) -> list[complex]:
    """Add the conjugate of every complex root that lacks one.

    Multiplicity counts: a pair given twice (a double pole pair) gets two conjugates;
    a root given together with its own conjugate gets none.
    """
    out = list(roots)
    unmatched = list(roots)
    for root in roots:
        if root not in unmatched or abs(root.imag) == 0:
            continue
        unmatched.remove(root)
        tol = 1e-12 * max(abs(root), 1)
        partner = next((r for r in unmatched if abs(r - root.conjugate()) <= tol), None)
        if partner is not None:
            unmatched.remove(partner)
        else:
            out.append(root.conjugate())
    return out


class RationalParams(DUTParams):
    """Parameters of the ``rational`` model (see the module doc)."""

    model: Literal["rational"] = "rational"
    poles_hz: list[Root] | None = None
    zeros_hz: list[Root] | None = None
    gain: float | None = None
    dc_gain: float | None = None
    numerator: list[float] | None = None
    denominator: list[float] | None = None
    delay_s: float = Field(0.0, ge=0.0, le=1.0)
    limit_v: float | None = Field(None, gt=0.0)

    @field_validator("poles_hz", "zeros_hz")
    @classmethod
    def _roots_parse(cls, value):
        if value is not None:
            for item in value:
                _parse_root(item)
        return value

    @model_validator(mode="after")
    def _one_form(self):
        zpk = self.poles_hz is not None or self.zeros_hz is not None
        poly = self.numerator is not None or self.denominator is not None
        if zpk and poly:
            raise ValueError("give either poles_hz/zeros_hz or numerator/denominator, not both")
        if poly and (self.numerator is None or self.denominator is None):
            raise ValueError("numerator and denominator go together")
        if poly and (self.gain is not None or self.dc_gain is not None):
            raise ValueError("gain and dc_gain belong to the poles_hz/zeros_hz form")
        if self.gain is not None and self.dc_gain is not None:
            raise ValueError("give gain or dc_gain, not both")
        if self.denominator is not None and not any(self.denominator):
            raise ValueError("the denominator is all zeros")
        if self.numerator is not None and self.denominator is not None:
            num = np.trim_zeros(np.asarray(self.numerator, float), "f")
            den = np.trim_zeros(np.asarray(self.denominator, float), "f")
            if num.size > den.size:
                raise ValueError("improper: the numerator's degree exceeds the denominator's")
        if zpk:
            zeros = _complete_pairs([_parse_root(r) for r in self.zeros_hz or []])
            poles = _complete_pairs([_parse_root(r) for r in self.poles_hz or []]) \
                if self.poles_hz is not None else [0j] * 3
            if len(zeros) > len(poles):
                raise ValueError("more zeros than poles (improper transfer function); "
                                 "a complex root counts twice (its conjugate is added)")
        return self


@register_dut
class RationalDUT(DUTModel):
    """A broken loop given as H(s), optional delay and soft limit."""

    name = "rational"
    description = "a transfer function H(s) from poles/zeros/gain or polynomials, optional delay"
    Params = RationalParams

    def __init__(self, params: RationalParams) -> None:
        super().__init__(params)
        p = params
        if p.numerator is not None:
            h = Rational(np.asarray(p.numerator, float), np.asarray(p.denominator, float))
        else:
            poles_hz = p.poles_hz if p.poles_hz is not None else \
                [-3000.0, "-20000+15000j", "-20000-15000j"]
            zeros_hz = p.zeros_hz or []
            poles = 2 * np.pi * np.asarray(_complete_pairs([_parse_root(r) for r in poles_hz]))
            zeros = 2 * np.pi * np.asarray(_complete_pairs([_parse_root(r) for r in zeros_hz]))
            if p.gain is not None:
                h = Rational.from_zpk(zeros, poles, p.gain)
            else:
                dc_gain = -5.0 if p.dc_gain is None else p.dc_gain
                unit = Rational.from_zpk(zeros, poles, 1.0)
                at_dc = complex(unit(0.0))
                if not np.isfinite(at_dc) or at_dc == 0:
                    raise ValueError("dc_gain needs H(0) finite and nonzero (no pole or "
                                     "zero at the origin); give gain instead")
                h = Rational.from_zpk(zeros, poles, dc_gain / at_dc.real)
        self._h = h

    @property
    def delay_s(self) -> float:
        return self.params.delay_s

    def stage_gain_and_limit(self) -> tuple[float, float | None]:
        return 1.0, self.params.limit_v

    def probe_transfer_functions(self) -> tuple[Rational, Rational]:
        return Rational.constant(1.0), self._h
