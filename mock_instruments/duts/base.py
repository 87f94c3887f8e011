"""The common shape of every simulated device under test (DUT).

A DUT is seen by the bench as two linear channels driven by the generator (the probe
voltages per volt of stimulus) plus, for the closed loop, a loop in the classic
nonlinear-feedback form: a static gain stage with soft saturation followed by a linear
network,

    w = limit * tanh(gain * v / limit)        (the stage; linear when limit is None)
    dx/dt = A x + B w,   v = C x             (the network G(s); H(s) = gain * G(s))

Open loop (the generator drives the stage input), the small-signal loop response is
``H(s) = gain * G(s)``. The stage's soft saturation adds harmonics to the returned
signal; the linear network then filters them, which is what the bench's THD shows.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from pydantic import BaseModel, ConfigDict

from mock_instruments.lti import Rational, StateSpace


class DUTParams(BaseModel):
    """Base of every DUT's parameter model (unknown keys are refused)."""

    # NaN and infinity are refused: no circuit has them (allow_inf_nan=False).
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    model: str
    description: str | None = None


@dataclass(frozen=True)
class LoopSystem:
    """The closed-loop form: ``w = limit*tanh(gain*v/limit)``, ``G(s)`` from w to v.

    Attributes
    ----------
    network
        Realisation of ``G(s)`` (strictly proper, so the loop has no algebraic loop).
    gain
        Small-signal gain of the stage (sign included).
    limit
        Output level the stage saturates softly towards (stage-output units), or None.
    """

    network: StateSpace
    gain: float
    limit: float | None

    def stage(self, v: np.ndarray) -> np.ndarray:
        """Stage output for input ``v`` (vectorised)."""
        if self.limit is None:
            return self.gain * v
        return self.limit * np.tanh(self.gain * v / self.limit)


class DUTModel:
    """Base class of the DUT models; subclasses set the class attributes and methods.

    Subclasses define ``name``, ``description``, ``Params`` and at least
    :meth:`probe_transfer_functions`. Circuit models also override
    :meth:`probe_phasors` with their own node equations, so that the tests compare two
    independent computations.
    """

    name: ClassVar[str] = ""
    description: ClassVar[str] = ""
    Params: ClassVar[type[DUTParams]] = DUTParams

    def __init__(self, params: DUTParams) -> None:
        self.params = params

    # --- what the bench needs ---------------------------------------------------------
    @property
    def delay_s(self) -> float:
        """Pure delay of the returned signal (channel 2) in seconds."""
        return 0.0

    def probe_transfer_functions(self) -> tuple[Rational, Rational]:
        """Channel 1 and channel 2 volts per volt of stimulus, as rational functions.

        The delay (:attr:`delay_s`) is not included.
        """
        raise NotImplementedError

    def stage_gain_and_limit(self) -> tuple[float, float | None]:
        """Small-signal stage gain and its soft limit (None = linear)."""
        return 1.0, None

    @property
    def stimulus_on_channel1(self) -> bool:
        """True when channel 1 sees the stimulus itself (then harmonics apply to channel 2)."""
        return True

    # --- exact responses ---------------------------------------------------------------
    def probe_phasors(self, frequency_hz) -> tuple[np.ndarray, np.ndarray]:
        """Complex volts at each probe per volt (phasor) of stimulus; delay included."""
        ch1, ch2 = self.probe_transfer_functions()
        f = np.asarray(frequency_hz, dtype=float)
        delay = np.exp(-2j * np.pi * f * self.delay_s)
        return ch1.at_hz(f), ch2.at_hz(f) * delay

    def loop_response(self, frequency_hz) -> np.ndarray:
        """Exact complex ``H = response / reference`` the bench measures (no impairments)."""
        p1, p2 = self.probe_phasors(frequency_hz)
        return p2 / p1

    def transfer_function(self) -> Rational:
        """The measured ``H(s)`` as one rational function (delay excluded)."""
        ch1, ch2 = self.probe_transfer_functions()
        return ch2 * ch1.reciprocal()

    def true_transfer_function(self) -> Rational:
        """The loop's own ``H(s)`` (differs from the measured one only for injection models)."""
        return self.transfer_function()

    def time_constants_s(self) -> np.ndarray:
        """Time constants of the decaying modes of the probe signals (seconds)."""
        poles = np.concatenate([tf.poles() for tf in self.probe_transfer_functions()])
        decaying = poles[poles.real < 0]
        return np.sort(-1.0 / decaying.real)[::-1]

    def loop_system(self) -> LoopSystem:
        """The closed-loop form (see the module doc).

        The default splits ``true_transfer_function`` as ``gain * G(s)``; a response
        with a direct feed-through gets a fast pole (20x the fastest mode) so that the
        loop has no algebraic loop, and a delay is replaced by its second-order Pade form.
        """
        gain, limit = self.stage_gain_and_limit()
        h = self.true_transfer_function()
        g = Rational(h.num / gain, h.den)
        if self.delay_s > 0:
            tau = self.delay_s
            g = g * Rational(np.array([tau**2 / 12, -tau / 2, 1.0]),
                             np.array([tau**2 / 12, tau / 2, 1.0]))
        if not g.strictly_proper:
            poles = g.poles()
            fastest = float(np.max(np.abs(poles))) if poles.size else g.reference_rad_s
            g = g * Rational(np.array([1.0]), np.array([1.0 / (20 * fastest), 1.0]))
        return LoopSystem(g.realise(), gain, limit)

    def __repr__(self) -> str:
        return f"<DUT {self.name}: {self.params!r}>"
