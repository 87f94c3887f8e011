"""Random stable rational DUTs: the bench's ratio equals scipy.signal.freqs_zpk.

Property test (hypothesis): any stable set of real poles and complex pairs, zeros and
gain; the exact response is checked against scipy.signal.freqs_zpk (reference
library) and the bench's fitted ratio (3-parameter sine fit, IEEE 1057) against it.
"""

from __future__ import annotations

import numpy as np
import scipy.signal
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from mock_instruments.bench import Impairments, SimulatedBench
from mock_instruments.duts import load_dut

decades = st.floats(min_value=2.0, max_value=5.0)


@st.composite
def stable_roots(draw, max_real=3, max_pairs=2):
    real = [-(10 ** draw(decades)) for _ in range(draw(st.integers(0, max_real)))]
    pairs = []
    for _ in range(draw(st.integers(0, max_pairs))):
        magnitude = 10 ** draw(decades)
        damping = draw(st.floats(min_value=0.05, max_value=0.95))
        pairs.append(complex(-damping * magnitude, magnitude * np.sqrt(1 - damping**2)))
    return real, pairs


class _Clock:
    def __init__(self) -> None:
        self.t_s = 50.0

    def __call__(self) -> float:
        return self.t_s


def _phasor(volts, frequency_hz, sample_rate_hz):
    t = np.arange(volts.size) / sample_rate_hz
    w = 2 * np.pi * frequency_hz
    basis = np.column_stack([np.cos(w * t), np.sin(w * t), np.ones_like(t)])
    a, b, _ = np.linalg.lstsq(basis, volts, rcond=None)[0]
    return complex(a, -b)


@settings(max_examples=25, deadline=None)
@given(poles=stable_roots(), zeros=stable_roots(max_real=2, max_pairs=1),
       log_f=st.floats(min_value=1.5, max_value=5.5), gain=st.floats(0.1, 10.0))
def test_random_rational_matches_freqs_zpk_and_bench(poles, zeros, log_f, gain):
    real_p, pairs_p = poles
    real_z, pairs_z = zeros
    n_poles = len(real_p) + 2 * len(pairs_p)
    n_zeros = len(real_z) + 2 * len(pairs_z)
    # (hypothesis fails its health check if this filters out too many examples)
    assume(n_poles > 0 and n_zeros <= n_poles)
    to_text = [f"{r.real}{r.imag:+}j" for r in pairs_p]
    dut = load_dut("rational", poles_hz=[*real_p, *to_text],
                   zeros_hz=[*real_z, *[f"{r.real}{r.imag:+}j" for r in pairs_z]],
                   dc_gain=gain)
    p = 2 * np.pi * np.array([*real_p, *pairs_p, *np.conj(pairs_p)], dtype=complex)
    z = 2 * np.pi * np.array([*real_z, *pairs_z, *np.conj(pairs_z)], dtype=complex)
    k = gain * np.prod(-p).real / np.prod(-z).real
    f = 10**log_f
    _, reference = scipy.signal.freqs_zpk(z, p, k, worN=[2 * np.pi * f])
    exact = complex(dut.loop_response(f))
    assert abs(exact / reference[0] - 1) < 1e-9

    clock = _Clock()
    bench = SimulatedBench(dut, Impairments(adc_bits=0), clock=clock)
    bench.channels[2].scale_v_per_div = 1e12
    bench.apply_generator(frequency_hz=f, output_on=True)
    clock.t_s += 40 * bench.settling_time_constant_s()
    fs = 64 * f
    rec = bench.acquire(64 * 8, fs)
    ratio = _phasor(rec[2], f, fs) / _phasor(rec[1], f, fs)
    assert abs(ratio / reference[0] - 1) < 1e-6
