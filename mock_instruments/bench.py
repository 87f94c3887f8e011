"""The physics of the simulated bench: generator -> DUT -> two scope channels.

One :class:`SimulatedBench` is shared by the simulated generator, scope and loop switch
(their SCPI front ends live in :mod:`mock_instruments.instruments`). It keeps the
generator's state, the two scope channels' vertical settings and the loop switch, and
computes each acquisition from them:

1. the DUT's steady response to the generator's sine (each channel through its own
   rational transfer function, state-space realised), channel 2 optionally delayed and
   distorted by the DUT's soft saturation (harmonics through the DUT's network);
2. the settling transient since the last generator change: the realisation's state is
   continuous across the change, and the difference to the new steady state decays with
   ``exp(A t)``, i.e. with the DUT's own poles, evaluated at the bench clock;
3. with the loop closed, the loop's own time integration instead (see
   :mod:`mock_instruments.oscillate`);
4. then the scope: AC coupling, DC offsets, white noise, scope clock offset, trigger
   jitter, channel skew, quantisation over the screen and clipping at its edges
   (:mod:`mock_instruments.signal_chain`).

Channel 2's probe and input may differ from channel 1's (:class:`Impairments`:
``channel2_gain_error``, ``channel2_delay_s``, ``channel2_pole_hz``): whatever channel 2
looks at, it sees through that mismatch. :meth:`SimulatedBench.set_probes_joined` puts
channel 2's probe on channel 1's node (the relay box's relay 2), so channel 2 / channel
1 is then the mismatch alone: what a channel calibration measures.

The bench clock is injectable (tests advance a fake clock; the default is
``time.monotonic``), so settling behaves deterministically in tests.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field, fields, replace
from pathlib import Path

import numpy as np
import scipy.linalg

from loopwright.errors import InputError
from mock_instruments import signal_chain
from mock_instruments.duts import DUTModel, load_dut
from mock_instruments.lti import Rational, StateSpace
from mock_instruments.oscillate import ClosedLoopRun

#: Harmonics of the soft saturation carried through the DUT's network.
HARMONICS = 9
#: Points per period used to find the saturation's harmonics.
_HARMONIC_POINTS = 64
#: Generator changes kept for channels read with a delay.
_KEPT_SEGMENTS = 4


@dataclass
class GeneratorState:
    """What the simulated generator is doing."""

    frequency_hz: float = 1000.0
    amplitude_vpp: float = 0.1
    offset_v: float = 0.0
    output_on: bool = False
    shape: str = "sine"


@dataclass
class ScopeChannelState:
    """One scope channel's vertical settings."""

    scale_v_per_div: float = 1.0
    offset_v: float = 0.0        # volts at screen centre; the ADC spans offset +- 4 div
    coupling: str = "DC"         # "AC" removes the DC part
    probe_attenuation: float = 1.0


@dataclass
class Impairments:
    """How far the simulated bench is from ideal.

    ``adc_bits = 0`` is an ideal converter (no quantisation; clipping still applies),
    for exactness tests.

    The ``channel2_*`` fields describe channel 2's probe and input against channel 1's:
    channel 2 shows ``(1 + channel2_gain_error) exp(-j w channel2_delay_s) /
    (1 + j f / channel2_pole_hz)`` times the voltage at its probe tip
    (:meth:`SimulatedBench.channel2_mismatch`). With the loop closed only the gain
    error and the delay apply (the closed loop is sampled, not filtered).
    """

    noise_v_rms: tuple[float, float] = (0.0, 0.0)   # per channel, at the probe tip
    adc_bits: int = 12                             # 8 or 12 (0 = ideal)
    dc_offsets_v: tuple[float, float] = (0.0, 0.0)
    clock_offset_ppm: float = 0.0                  # scope sample clock vs generator
    trigger_jitter_s: float = 0.0
    skew_s: float = 0.0                            # channel 2 sampled this much later
    channel2_gain_error: float = 0.0               # ratio - 1: 0.01 = channel 2 reads 1 % high
    channel2_delay_s: float = 0.0                  # probe/cable delay beyond channel 1's
    channel2_pole_hz: float | None = None          # first-order probe pole (None = flat)


@dataclass(frozen=True)
class _Drive:
    """The stimulus in one interval: ``Re{U exp(j w (t - t_ref))} + dc``."""

    phasor: complex
    omega_rad_s: float
    dc_v: float
    t_ref_s: float


@dataclass
class _Segment:
    """Open-loop state from one generator change on: drive + homogeneous states."""

    t0_s: float
    drive: _Drive
    homogeneous: list[np.ndarray]


@dataclass
class _Channel:
    """A probe channel's linear system with its cached modal form."""

    system: StateSpace
    delay_s: float
    modes: tuple[np.ndarray, np.ndarray, np.ndarray] | None = field(default=None)

    def __post_init__(self) -> None:
        A = self.system.A
        self.unstable = False
        if self.system.order:
            eigvals, vecs = np.linalg.eig(A)
            # A growing open-loop mode would overflow within seconds of bench time; it
            # is left out of the transient (as if the DUT's bias held it), and only the
            # steady response is shown.
            self.unstable = bool(np.any(eigvals.real > 1e-9 * np.abs(eigvals)))
            if np.linalg.cond(vecs) < 1e8:
                self.modes = (eigvals, vecs, np.linalg.inv(vecs))

    def steady_state(self, drive: _Drive, t_s: float) -> np.ndarray:
        """State of the steady response at one time."""
        sys = self.system
        if sys.order == 0:
            return np.zeros(0)
        x_ac = sys.state_phasor(drive.omega_rad_s)
        x_dc = sys.state_phasor(0.0).real
        rotation = np.exp(1j * drive.omega_rad_s * (t_s - drive.t_ref_s))
        return (x_ac * drive.phasor * rotation).real + x_dc * drive.dc_v

    def homogeneous_output(self, x0: np.ndarray, dt_s: np.ndarray,
                           floor_v: float = 0.0) -> np.ndarray:
        """``C exp(A dt) x0`` for an ascending array of ``dt`` (negative = 0).

        A mode is computed only while it exceeds ``floor_v`` (it is exactly zero to
        within that afterwards), so a long record pays only for its settling part.
        """
        sys = self.system
        out = np.zeros(dt_s.shape)
        if sys.order == 0 or not np.any(x0) or dt_s.size == 0:
            return out
        dt = np.maximum(dt_s, 0.0)
        if self.modes is not None:
            eigvals, vecs, inv = self.modes
            weights = (sys.C @ vecs) * (inv @ x0)
            keep = eigvals.real <= 1e-9 * np.abs(eigvals)
            start = np.abs(weights[keep]) * np.exp(eigvals[keep].real * dt[0])
            floor_v = max(floor_v, 1e-17 * float(start.sum()), 1e-300)
            for lam, weight in zip(eigvals, weights, strict=True):
                size = abs(weight)
                if size == 0 or lam.real > 1e-9 * abs(lam):
                    continue
                count = dt.size
                if lam.real < 0:
                    lasts_s = np.log(size / floor_v) / -lam.real
                    count = int(np.searchsorted(dt, lasts_s, side="right"))
                if count:
                    out[:count] += (weight * np.exp(lam * dt[:count])).real
            return out
        if self.unstable:
            return out
        # Not diagonalisable (repeated poles): step along the record with matrix
        # exponentials (one for the whole record when it is uniformly spaced).
        steps = np.diff(dt)
        uniform = steps.size == 0 or np.allclose(steps, steps.mean(), rtol=1e-9, atol=0)
        phi = scipy.linalg.expm(sys.A * steps.mean()) if uniform and steps.size else None
        x = scipy.linalg.expm(sys.A * dt[0]) @ x0
        out[0] = sys.C @ x
        floor_v = max(floor_v, 1e-17 * abs(out[0]), 1e-300)
        c_norm = float(np.linalg.norm(sys.C))
        for i in range(1, dt.size):
            x = (phi if phi is not None else scipy.linalg.expm(sys.A * steps[i - 1])) @ x
            out[i] = sys.C @ x
            if c_norm * float(np.linalg.norm(x)) < floor_v:
                break
        return out

    def state_at(self, segment: _Segment, index: int, t_s: float) -> np.ndarray:
        """Full state at ``t_s`` within ``segment``."""
        if self.system.order == 0:
            return np.zeros(0)
        steady = self.steady_state(segment.drive, t_s)
        x0 = segment.homogeneous[index]
        dt = max(t_s - segment.t0_s, 0.0)
        if self.modes is not None:
            eigvals, vecs, inv = self.modes
            keep = eigvals.real <= 1e-9 * np.abs(eigvals)
            growth = np.zeros(eigvals.shape, dtype=complex)
            growth[keep] = np.exp(eigvals[keep] * dt)
            return steady + (vecs @ (growth * (inv @ x0))).real
        if self.unstable:
            return steady
        return steady + scipy.linalg.expm(self.system.A * dt) @ x0


class SimulatedBench:
    """A generator and a two-channel scope around one DUT (thread-safe).

    Parameters
    ----------
    dut
        A :class:`~mock_instruments.duts.base.DUTModel` or the name/file for
        :func:`~mock_instruments.duts.load_dut`.
    impairments
        Noise, ADC, offsets, clock offset, jitter and skew.
    seed
        Seed of the bench's random source (noise, jitter, start-up of a closed loop).
    clock
        Returns the bench time in seconds (default ``time.monotonic``).

    Attributes
    ----------
    generator
        The generator's state; change it through :meth:`apply_generator`.
    channels
        ``{1: reference probe, 2: response probe}`` vertical settings (edit freely).
    loop_closed
        The loop switch; change it through :meth:`set_loop_closed`.
    probes_joined
        True while channel 2's probe sits on channel 1's node; change it through
        :meth:`set_probes_joined`.
    """

    def __init__(self, dut: DUTModel | str | Path, impairments: Impairments | None = None, *,
                 seed: int | None = None, clock: Callable[[], float] = time.monotonic) -> None:
        self.dut = dut if isinstance(dut, DUTModel) else load_dut(dut)
        self.impairments = impairments if impairments is not None else Impairments()
        if self.impairments.adc_bits not in (0, 8, 10, 12, 14, 16):
            raise InputError(f"adc_bits must be 8, 10, 12, 14, 16 or 0 (ideal), "
                             f"not {self.impairments.adc_bits}")
        mismatch = _channel2_mismatch_tf(self.impairments)
        self.clock = clock
        self.rng = np.random.default_rng(seed)
        self.generator = GeneratorState()
        self.channels: dict[int, ScopeChannelState] = {1: ScopeChannelState(),
                                                      2: ScopeChannelState()}
        self.loop_closed = False
        self.probes_joined = False
        self._lock = threading.RLock()
        ch1, ch2 = self.dut.probe_transfer_functions()
        probe_delay_s = float(self.impairments.channel2_delay_s)
        # channel 1; channel 2 on its own node; channel 2 on channel 1's node (joined).
        # All three keep their state across generator changes, so joining is seamless.
        probe = mismatch.realise()
        self._ch = [_Channel(ch1.realise(), 0.0),
                    _Channel(_series(ch2.realise(), probe), self.dut.delay_s + probe_delay_s),
                    _Channel(_series(ch1.realise(), probe), probe_delay_s)]
        gain, limit = self.dut.stage_gain_and_limit()
        self._stage_gain = gain
        self._stage_limit = limit
        self._phase_rad = 0.0          # generator phase at _phase_t_s
        self._phase_t_s = float(clock())
        now = self._phase_t_s
        zeros = [np.zeros(c.system.order) for c in self._ch]
        self._segments: list[_Segment] = [_Segment(now, self._drive(now), zeros)]
        self._closed_run: ClosedLoopRun | None = None

    # --- generator --------------------------------------------------------------------
    def _drive(self, t_ref_s: float) -> _Drive:
        g = self.generator
        if not g.output_on:
            return _Drive(0j, 2 * np.pi * g.frequency_hz, 0.0, t_ref_s)
        # sin(phase) = Re{-j exp(j phase)}
        phasor = (g.amplitude_vpp / 2) * -1j * np.exp(1j * self._phase_rad)
        return _Drive(phasor, 2 * np.pi * g.frequency_hz, g.offset_v, t_ref_s)

    def apply_generator(self, **changes) -> None:
        """Update generator fields; a change that alters the stimulus starts a transient.

        Raises
        ------
        InputError
            For an unknown field name or a shape other than ``"sine"``.
        """
        names = {f.name for f in fields(GeneratorState)}
        unknown = set(changes) - names
        if unknown:
            raise InputError(f"unknown generator field(s) {sorted(unknown)}; "
                             f"known: {sorted(names)}")
        if changes.get("shape", "sine") != "sine":
            # Loop-gain measurement uses a sine; the physics computes nothing else.
            raise InputError(f"the simulated generator makes only 'sine', not "
                             f"{changes['shape']!r}")
        with self._lock:
            new = replace(self.generator, **changes)
            if new == self.generator:
                return
            t = float(self.clock())
            # Generator phase is continuous across a change (keep the running phase).
            self._phase_rad = float(np.mod(
                self._phase_rad + 2 * np.pi * self.generator.frequency_hz * (t - self._phase_t_s),
                2 * np.pi))
            self._phase_t_s = t
            old = self._segments[-1]
            states = [ch.state_at(old, i, t) for i, ch in enumerate(self._ch)]
            self.generator = new
            drive = self._drive(t)
            homogeneous = [x - ch.steady_state(drive, t)
                           for x, ch in zip(states, self._ch, strict=True)]
            self._segments.append(_Segment(t, drive, homogeneous))
            del self._segments[:-_KEPT_SEGMENTS]

    # --- loop switch ------------------------------------------------------------------
    def set_loop_closed(self, closed: bool) -> None:
        """Close (the loop feeds itself, the generator is cut off) or open the loop.

        Closing starts the loop from a little noise; opening starts the open-loop
        response afresh (a transient from rest).
        """
        with self._lock:
            closed = bool(closed)
            if closed == self.loop_closed:
                return
            t = float(self.clock())
            self.loop_closed = closed
            if closed:
                self._closed_run = ClosedLoopRun(self.dut.loop_system(), self.rng, t)
            else:
                self._closed_run = None
                drive = self._drive(t)
                homogeneous = [-ch.steady_state(drive, t) for ch in self._ch]
                self._segments.append(_Segment(t, drive, homogeneous))
                del self._segments[:-_KEPT_SEGMENTS]

    # --- probes -------------------------------------------------------------------------
    def set_probes_joined(self, joined: bool) -> None:
        """Put channel 2's probe on channel 1's node (True) or back on its own (False).

        Joined, channel 2 shows channel 1's node through channel 2's own mismatch, so
        channel 2 / channel 1 = :meth:`channel2_mismatch`. The loop is not touched.
        """
        with self._lock:
            self.probes_joined = bool(joined)

    # --- exact answers ------------------------------------------------------------------
    def exact_response(self, frequency_hz) -> np.ndarray:
        """Complex ``H = response / reference`` of the DUT alone (no impairments, no
        channel mismatch): what a calibrated measurement should show."""
        return self.dut.loop_response(frequency_hz)

    def channel2_mismatch(self, frequency_hz) -> np.ndarray:
        """Complex channel 2 / channel 1 with both probes on one node (1 when matched)."""
        imp = self.impairments
        f = np.asarray(frequency_hz, dtype=float)
        return (_channel2_mismatch_tf(imp).at_hz(f)
                * np.exp(-2j * np.pi * f * float(imp.channel2_delay_s)))

    def acquisition_duration_s(self, record_length: int, sample_rate_hz: float) -> float:
        """Real time one record takes (scope clock offset included)."""
        return record_length / (sample_rate_hz * (1 + self.impairments.clock_offset_ppm * 1e-6))

    def settling_time_constant_s(self) -> float:
        """The slowest decaying time constant of the probe signals (seconds)."""
        taus = self.dut.time_constants_s()
        slowest = float(taus[0]) if taus.size else 0.0
        pole_hz = self.impairments.channel2_pole_hz
        if pole_hz is not None:
            slowest = max(slowest, 1.0 / (2 * np.pi * float(pole_hz)))
        return slowest

    # --- acquisition --------------------------------------------------------------------
    def _harmonics(self, drive: _Drive) -> np.ndarray:
        """Fourier coefficients (k = 0..HARMONICS) of the saturated stage, input-referred."""
        theta = 2 * np.pi * np.arange(_HARMONIC_POINTS) / _HARMONIC_POINTS
        u = drive.dc_v + (drive.phasor * np.exp(1j * theta)).real
        gain, limit = self._stage_gain, self._stage_limit
        w = limit * np.tanh(gain * u / limit) / gain
        spectrum = np.fft.fft(w) / _HARMONIC_POINTS
        coeffs = 2 * spectrum[: HARMONICS + 1]
        coeffs[0] = spectrum[0].real
        return coeffs

    def _open_loop_channel(self, index: int, t_base_s: float, dt_s: np.ndarray) -> np.ndarray:
        """Probe-tip volts of one channel at true times ``t_base_s + dt_s`` (open loop).

        Times are kept as a base plus small offsets so that phases stay accurate to
        the last bit even when the bench clock reads 1e5 s (an uptime).
        """
        ch = self._ch[index]
        base = t_base_s - ch.delay_s
        out = np.zeros(dt_s.shape)
        done = np.zeros(dt_s.shape, dtype=bool)
        distort = (index == 1 and self._stage_limit is not None
                   and self.dut.stimulus_on_channel1)
        for segment in reversed(self._segments):
            mask = ~done if segment is self._segments[0] else \
                (dt_s >= segment.t0_s - base) & ~done
            if not np.any(mask):
                continue
            dt = dt_s[mask]
            drive = segment.drive
            sys = ch.system
            phase = drive.omega_rad_s * ((base - drive.t_ref_s) + dt)
            rotation = np.exp(1j * phase)
            if distort and (drive.phasor != 0 or drive.dc_v != 0):
                coeffs = self._harmonics(drive)
                y = np.full(dt.shape, sys.response(0.0).real * coeffs[0].real)
                power = rotation
                for k in range(1, HARMONICS + 1):
                    if k > 1:
                        # e^{jk phase} by recurrence, renormalised against drift
                        power = power * rotation
                        power /= np.abs(power)
                    y += (sys.response(k * drive.omega_rad_s) * coeffs[k] * power).real
            else:
                y = (sys.response(drive.omega_rad_s) * drive.phasor * rotation).real
                y += sys.response(0.0).real * drive.dc_v
            level = (abs(sys.response(drive.omega_rad_s) * drive.phasor)
                     + abs(sys.response(0.0) * drive.dc_v))
            y += ch.homogeneous_output(segment.homogeneous[index],
                                       (base - segment.t0_s) + dt, 1e-16 * level)
            out[mask] = y
            done |= mask
        return out

    def _dc_level(self, index: int) -> float:
        """Steady DC part of a channel system (what AC coupling takes away)."""
        if self.loop_closed:
            return 0.0
        drive = self._segments[-1].drive
        return float(self._ch[index].system.response(0.0).real * drive.dc_v)

    def acquire(self, record_length: int, sample_rate_hz: float) -> dict[int, np.ndarray]:
        """One record of both channels from one trigger, in probe-tip volts.

        The record starts at the generator's next rising zero crossing after the bench
        clock's present time (the trigger), moved by the trigger jitter.

        Parameters
        ----------
        record_length
            Samples per channel (>= 2).
        sample_rate_hz
            The scope's nominal sample rate.

        Returns
        -------
        dict
            ``{1: reference volts, 2: response volts}``, float64 arrays.
        """
        if record_length < 2 or sample_rate_hz <= 0:
            raise InputError("a record needs at least 2 samples and a positive sample rate")
        imp = self.impairments
        with self._lock:
            now = float(self.clock())
            g = self.generator
            if self.loop_closed or not g.output_on:
                t_trig = now
            else:
                t_trig = signal_chain.next_rising_phase_zero_s(
                    now, g.frequency_hz, self._phase_rad, self._phase_t_s)
            if imp.trigger_jitter_s > 0:
                t_trig += float(self.rng.normal(0.0, imp.trigger_jitter_s))
            dt1 = signal_chain.sample_times(0.0, record_length, sample_rate_hz,
                                            imp.clock_offset_ppm)
            # the system channel 2 shows: its own node, or channel 1's when joined
            systems = (0, 2 if self.probes_joined else 1)
            if self.loop_closed:
                assert self._closed_run is not None
                run = self._closed_run
                # both probes see the one loop node; channel 2 through its gain and delay
                lag_s = imp.skew_s - float(imp.channel2_delay_s)
                start = t_trig + min(0.0, lag_s)
                if start < run.t_s:         # never before the loop's own present
                    t_trig += run.t_s - start
                v1, v2 = run.sample([t_trig + dt1, t_trig + lag_s + dt1])
                v2 = v2 * (1.0 + float(imp.channel2_gain_error))
            else:
                v1 = self._open_loop_channel(0, t_trig, dt1)
                v2 = self._open_loop_channel(systems[1], t_trig + imp.skew_s, dt1)
            records = {}
            for number, volts in ((1, v1), (2, v2)):
                state = self.channels[number]
                if state.coupling.upper() == "AC":
                    volts = volts - self._dc_level(systems[number - 1])
                volts = volts + imp.dc_offsets_v[number - 1]
                volts = volts + signal_chain.white_noise(self.rng, imp.noise_v_rms[number - 1],
                                                         record_length)
                records[number] = signal_chain.quantise(volts, state.scale_v_per_div,
                                                        state.offset_v, imp.adc_bits)
            return records


@dataclass(frozen=True)
class _Series(StateSpace):
    """``second`` driven by ``first``'s output; states ``[first's, second's]``.

    The steady response is the product of the parts' own (a DUT realisation with its
    own steady response, e.g. a replayed board's measured one, keeps it).
    """

    first: StateSpace | None = field(default=None, compare=False)
    second: StateSpace | None = field(default=None, compare=False)

    def state_phasor(self, omega_rad_s: float) -> np.ndarray:
        assert self.first is not None and self.second is not None
        x1 = self.first.state_phasor(omega_rad_s)
        x2 = self.second.state_phasor(omega_rad_s) * self.first.response(omega_rad_s)
        return np.concatenate([x1, x2])

    def response(self, omega_rad_s: float) -> complex:
        assert self.first is not None and self.second is not None
        return self.first.response(omega_rad_s) * self.second.response(omega_rad_s)


def _series(first: StateSpace, second: StateSpace) -> StateSpace:
    """``first`` followed by ``second`` (``first`` itself when ``second`` is a unit gain)."""
    if second.order == 0 and second.D == 1.0:
        return first
    n1, n2 = first.order, second.order
    a = np.zeros((n1 + n2, n1 + n2))
    a[:n1, :n1] = first.A
    a[n1:, :n1] = np.outer(second.B, first.C)
    a[n1:, n1:] = second.A
    b = np.concatenate([first.B, second.B * first.D])
    c = np.concatenate([second.D * first.C, second.C])
    return _Series(a, b, c, float(second.D * first.D), first=first, second=second)


def _channel2_mismatch_tf(impairments: Impairments) -> Rational:
    """Channel 2's gain error and probe pole as a rational function (delay apart).

    Raises
    ------
    InputError
        A gain error at or below -1, a negative delay or a pole frequency not above 0.
    """
    gain_error = float(impairments.channel2_gain_error)
    if not np.isfinite(gain_error) or gain_error <= -1.0:
        raise InputError(f"channel2_gain_error must be above -1 (a ratio minus 1),"
                         f" not {gain_error}")
    delay_s = float(impairments.channel2_delay_s)
    if not np.isfinite(delay_s) or delay_s < 0:
        raise InputError(f"channel2_delay_s must be 0 or more, not {delay_s}")
    tf = Rational.constant(1.0 + gain_error)
    pole_hz = impairments.channel2_pole_hz
    if pole_hz is not None:
        if not np.isfinite(pole_hz) or pole_hz <= 0:
            raise InputError(f"channel2_pole_hz must be above 0 Hz, not {pole_hz}")
        tf = tf * Rational(np.array([1.0]), np.array([1.0 / (2 * np.pi * float(pole_hz)), 1.0]))
    return tf
