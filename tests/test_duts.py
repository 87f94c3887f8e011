"""DUT models: exact responses against reference libraries and textbook formulas; DUT files."""

from __future__ import annotations

from pathlib import Path

import control
import numpy as np
import pytest
import scipy.signal

from loopwright.errors import InputError
from mock_instruments.duts import DUTS, load_dut, model_list

DUT_FILES = Path(__file__).resolve().parents[1] / "mock_instruments" / "dut_files"
ALL_MODELS = ["rational", "lc_oscillator", "wien", "phase_shift", "buck_injection",
              "opamp_capload"]
# Linear versions (soft limits off) so the small-signal response is the whole story.
LINEAR = {"rational": {}, "lc_oscillator": {"current_limit_a": None},
          "wien": {"output_limit_v": None}, "phase_shift": {"output_limit_v": None},
          "buck_injection": {}, "opamp_capload": {}}


def test_every_model_is_registered_with_a_description():
    names = [name for name, _ in model_list()]
    assert names == sorted(names)
    # The physics models; other modules of the package may register more (e.g. a
    # board replayed from a stored run).
    assert set(ALL_MODELS) <= set(names)
    for name, text in model_list():
        assert text and "\n" not in text, name
        assert DUTS[name].name == name


@pytest.mark.parametrize("name", ALL_MODELS)
def test_exact_response_matches_scipy_freqs(name):
    # Reference: scipy.signal.freqs on the model's own polynomials; the model's
    # loop_response comes from its circuit equations (complex impedances).
    dut = load_dut(name, **LINEAR[name])
    tf = dut.transfer_function()
    f = np.logspace(0, 7, 57)
    _, reference = scipy.signal.freqs(tf.num, tf.den, worN=2 * np.pi * f)
    reference = reference * np.exp(-2j * np.pi * f * dut.delay_s)
    np.testing.assert_allclose(dut.loop_response(f), reference, rtol=1e-6)


@pytest.mark.parametrize("name", ["rational", "lc_oscillator", "wien", "phase_shift",
                                  "opamp_capload"])
def test_exact_response_matches_python_control(name):
    # Reference: python-control's evaluation of the same transfer function.
    dut = load_dut(name, **LINEAR[name])
    tf = dut.transfer_function()
    system = control.tf(tf.num, tf.den)
    f = np.logspace(1, 6.5, 23)
    reference = np.array([complex(system(2j * np.pi * fi)) for fi in f])
    np.testing.assert_allclose(dut.loop_response(f), reference, rtol=1e-6)


def test_rational_zpk_form_matches_scipy_zpk():
    # Reference: scipy.signal.freqs_zpk (zeros/poles in rad/s, gain k).
    dut = load_dut("rational", zeros_hz=[-500.0], poles_hz=[-50.0, "-4000+3000j"], gain=2.0e4)
    z = 2 * np.pi * np.array([-500.0])
    p = 2 * np.pi * np.array([-50.0, -4000 + 3000j, -4000 - 3000j])
    f = np.logspace(0, 6, 31)
    _, reference = scipy.signal.freqs_zpk(z, p, 2.0e4, worN=2 * np.pi * f)
    np.testing.assert_allclose(dut.loop_response(f), reference, rtol=1e-9)


def test_rational_dc_gain_and_delay():
    dut = load_dut("rational", poles_hz=[-1000.0], dc_gain=-4.0, delay_s=2e-6)
    assert dut.loop_response(0.0) == pytest.approx(-4.0)
    # A pure delay adds -360 f delay degrees (definition of a delay).
    f = 20e3
    ideal = -4.0 / (1 + 1j * f / 1000.0)
    extra = np.degrees(np.angle(dut.loop_response(f) / ideal))
    assert extra == pytest.approx(-360 * f * 2e-6, abs=1e-9)


def test_rational_polynomial_form():
    # 2/(s(s+1)(s+2)) from references.md's margin table: H = -L.
    dut = load_dut("rational", numerator=[-2.0], denominator=[1.0, 3.0, 2.0, 0.0])
    w = np.sqrt(2.0)
    # Phase crossover of L at w = sqrt(2) with |L| = 1/3 (gain margin 3; Ogata 7-6 (mem)).
    assert dut.loop_response(w / (2 * np.pi)) == pytest.approx(1 / 3, abs=1e-12)


def test_colpitts_reference_example_frequency():
    # references.md: 10 uH, 1 nF, 4 nF -> 1,779,406.36 Hz (Colpitts f0 formula).
    dut = load_dut("lc_oscillator", inductance_h=10e-6, c1_f=1e-9, c2_f=4e-9)
    assert dut.resonance_hz() == pytest.approx(1_779_406.36, abs=0.01)


def test_lc_loop_phase_zero_at_resonance_with_gain_gm_r_c1_over_c2():
    # Derived in the model's doc from the pi-tank node equations.
    dut = load_dut("lc_oscillator", current_limit_a=None)
    p = dut.params
    h = complex(dut.loop_response(dut.resonance_hz()))
    assert abs(np.angle(h, deg=True)) < 1e-9
    assert h.real == pytest.approx(p.transconductance_s * p.tank_resistance_ohm * p.c1_f / p.c2_f,
                                   rel=1e-9)
    # The 0-degree crossing is at the textbook f0: just below it the phase is positive.
    f0 = dut.resonance_hz()
    assert np.angle(dut.loop_response(0.999 * f0)) > 0 > np.angle(dut.loop_response(1.001 * f0))


def test_wien_beta_one_third_at_f0():
    # Wien bridge: beta = 1/3 at 0 degrees at f0 = 1/(2 pi R C) (Sedra & Smith ch. 18 (mem)).
    dut = load_dut("wien", output_limit_v=None)
    h = complex(dut.loop_response(dut.resonance_hz()))
    assert h == pytest.approx(dut.params.gain / 3, abs=1e-12)
    assert dut.resonance_hz() == pytest.approx(1 / (2 * np.pi * 15e3 * 10e-9), rel=1e-12)


def test_phase_shift_critical_gain_29():
    # Three-section RC ladder: beta = -1/29 at 180 degrees (Sedra & Smith ch. 18 (mem));
    # low-pass ladder frequency sqrt(6)/(2 pi R C).
    dut = load_dut("phase_shift", output_limit_v=None)
    h = complex(dut.loop_response(dut.resonance_hz()))
    assert h == pytest.approx(dut.params.gain / 29, abs=1e-12)
    # The polynomial form agrees with the ABCD-matrix ladder (two computations).
    tf = dut.transfer_function()
    assert complex(tf.at_hz(dut.resonance_hz())) == pytest.approx(h, abs=1e-12)


def test_opamp_capacitive_load_costs_phase_margin():
    # Phase margin = angle(H) at |H| = 1 (project convention; Ogata 7-6 (mem)).
    def margin(dut):
        f = np.logspace(4, 8, 40001)
        h = dut.loop_response(f)
        i = np.argmin(np.abs(np.abs(h) - 1))
        return np.angle(h[i], deg=True)

    bare = margin(load_dut("opamp_capload", load_capacitance_f=0.0))
    loaded = margin(load_dut("opamp_capload"))
    # Two-pole amp alone: PM = 180 - atan(fc/f1) - atan(fc/f2) at its crossover fc.
    f = np.logspace(4, 8, 40001)
    h = load_dut("opamp_capload", load_capacitance_f=0.0).loop_response(f)
    fc = f[np.argmin(np.abs(np.abs(h) - 1))]
    by_hand = 180 - np.degrees(np.arctan(fc / 20.0) + np.arctan(fc / 8e6))
    assert bare == pytest.approx(by_hand, abs=1e-6)
    assert loaded < bare - 20


class TestBuckInjection:
    """Middlebrook 1975 voltage injection (formula re-derived in references.md)."""

    def test_measured_h_follows_middlebrook(self):
        dut = load_dut("buck_injection")
        f = np.logspace(1, 6, 41)
        z1, z2 = dut.injection_impedances(f)
        t = -dut.true_loop_response(f)            # T, the loop's own gain
        middlebrook = -t * (1 + z1 / z2) - z1 / z2
        np.testing.assert_allclose(dut.loop_response(f), middlebrook, rtol=1e-9)

    def test_good_point_is_accurate_and_bad_point_is_not(self):
        f = np.logspace(2, 5.3, 30)
        good = load_dut("buck_injection")
        z1, z2 = good.injection_impedances(f)
        assert np.max(np.abs(z1 / z2)) < 1e-4
        err_good = np.abs(good.loop_response(f) / good.true_loop_response(f) - 1)
        assert err_good.max() < 1e-3
        # Bad point: a 2 kOhm source into 5 kOhm || 1 nF, |Z1/Z2| near 0.4 and above.
        bad = load_dut("buck_injection", source_resistance_ohm=2000.0, source_inductance_h=0.0,
                       load_resistance_ohm=5000.0, load_capacitance_f=1e-9)
        err_bad = np.abs(bad.loop_response(f) / bad.true_loop_response(f) - 1)
        assert err_bad.min() > 0.3
        z1, z2 = bad.injection_impedances(f)
        # Near crossover, where |T| ~ 1, the error is the full Z1/Z2 term (Middlebrook).
        t = -bad.true_loop_response(f)
        np.testing.assert_allclose(bad.loop_response(f), -t * (1 + z1 / z2) - z1 / z2, rtol=1e-9)

    def test_true_polynomial_form_matches_circuit(self):
        dut = load_dut("buck_injection")
        f = np.logspace(1, 6, 21)
        np.testing.assert_allclose(dut.true_transfer_function().at_hz(f),
                                   dut.true_loop_response(f), rtol=1e-9)


# --- DUT files -----------------------------------------------------------------------------
@pytest.mark.parametrize("path", sorted(DUT_FILES.glob("*.yaml")), ids=lambda p: p.name)
def test_shipped_dut_files_load(path):
    dut = load_dut(path)
    assert dut.name in DUTS
    assert np.all(np.isfinite(dut.loop_response(np.logspace(1, 6, 11))))


def test_shipped_dut_files_cover_every_model():
    names = {load_dut(path).name for path in DUT_FILES.glob("*.yaml")}
    assert set(ALL_MODELS) <= names


def test_file_overrides_apply(tmp_path):
    path = tmp_path / "w.yaml"
    path.write_text("model: wien\nresistance_ohm: 10000\n")
    dut = load_dut(path, gain=3.1)
    assert dut.params.resistance_ohm == 10000 and dut.params.gain == 3.1


@pytest.mark.parametrize(("text", "line", "field"), [
    ("model: wien\nresistance_ohm: 1e4\ncapacitanse_f: 1e-9\n", 3, "capacitanse_f"),
    ("model: wien\nresistance_ohm: -5\n", 2, "resistance_ohm"),
    ("model: lc_oscillator\n\ninductance_h: lots\n", 3, "inductance_h"),
    ("model: tunnel_diode\n", 1, "model"),
    ("resistance_ohm: 1e4\n", 1, "model"),
    ("model: rational\npoles_hz: [-100, 'x+2j']\n", 2, "poles_hz"),
])
def test_bad_dut_files_name_file_line_and_field(tmp_path, text, line, field):
    path = tmp_path / "bad.yaml"
    path.write_text(text)
    with pytest.raises(InputError) as info:
        load_dut(path)
    err = info.value
    assert err.path == str(path)
    assert err.line == line
    assert err.field is not None and err.field.startswith(field)
    assert str(err).startswith(f"{path}:{line}: ")


def test_bad_cross_field_rational_file(tmp_path):
    path = tmp_path / "both.yaml"
    path.write_text("model: rational\npoles_hz: [-100]\nnumerator: [1]\ndenominator: [1, 1]\n")
    with pytest.raises(InputError, match="either poles_hz"):
        load_dut(path)


def test_unknown_name_and_bad_override():
    with pytest.raises(InputError, match="no DUT model or file"):
        load_dut("tunnel_diode")
    with pytest.raises(InputError) as info:
        load_dut("wien", gain=-1)
    assert info.value.field == "gain"


def test_opamp_output_limit_is_a_soft_swing_limit():
    dut = load_dut("opamp_capload", output_limit_v=3.0)
    system = dut.loop_system()
    # Stage input 1 V would ask 1e5 V: the tanh stage holds it at the 3 V swing.
    assert system.stage(np.array([1.0]))[0] == pytest.approx(-3.0)
    # Small signals see the unchanged small-signal loop.
    f = np.logspace(1, 7, 13)
    np.testing.assert_allclose(dut.loop_response(f), load_dut("opamp_capload").loop_response(f))
