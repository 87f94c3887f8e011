"""Write the example frequency responses in this folder (deterministic).

Every response here is invented: circuits, component values and noise are our own,
chosen to show what ``loopwright analyze`` reports. Run from anywhere::

    python3 examples/make_responses.py

Files written (see README.md in this folder):

- ``buck_loop_response.csv``: a voltage-mode step-down regulator with type-III
  compensation, 100 Hz..1 MHz, 20 points per decade, a little seeded noise with its
  std columns (``frequency_hz,gain_db,phase_deg,gain_db_std,phase_deg_std``).
- ``buck_loop_response_noisy.csv``: the same loop measured with ten times the noise.
- ``tank_oscillator_loop_response.csv``: a tuned-amplifier oscillator loop, exact
  complex values (``frequency_hz,gain_re,gain_im``), 1..10 MHz, 40 points per decade.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def buck_loop(frequency_hz: np.ndarray) -> np.ndarray:
    """Invented loop gain L of a voltage-mode buck (negative feedback), at ``frequency_hz``.

    Power stage: 12 V in, 1.8 V ramp, 4.7 uH, 220 uF with 8 mohm ESR, 0.5 ohm load.
    Type-III compensator: integrator, two zeros at 3.5 kHz and 5 kHz, poles at the ESR
    zero and at 300 kHz; its gain puts the crossover near 40 kHz. The modulator's
    sampling is modelled as a pole pair at half the 500 kHz switching frequency with
    Q = 0.64 (a common approximation (practice)), which brings a gain margin in range.
    """
    s = 2j * np.pi * frequency_hz
    vin, vramp = 12.0, 1.8
    inductance_h, capacitance_f, esr_ohm, load_ohm = 4.7e-6, 220e-6, 8e-3, 0.5
    w0 = 1.0 / np.sqrt(inductance_h * capacitance_f)
    q = load_ohm * np.sqrt(capacitance_f / inductance_h)
    w_esr = 1.0 / (esr_ohm * capacitance_f)
    plant = (vin / vramp) * (1 + s / w_esr) / (1 + s / (q * w0) + (s / w0) ** 2)
    wz1, wz2 = 2 * np.pi * 3.5e3, 2 * np.pi * 5e3
    wp1, wp2 = w_esr, 2 * np.pi * 300e3
    w_half, q_half = 2 * np.pi * 250e3, 0.64

    def sampling(s: np.ndarray) -> np.ndarray:
        return 1.0 / (1 + s / (q_half * w_half) + (s / w_half) ** 2)

    shape = (1 + s / wz1) * (1 + s / wz2) / ((1 + s / wp1) * (1 + s / wp2)) / s * sampling(s)
    # Integrator gain chosen so that |L| = 1 at 40 kHz.
    s_c = 2j * np.pi * 40e3
    plant_c = (vin / vramp) * (1 + s_c / w_esr) / (1 + s_c / (q * w0) + (s_c / w0) ** 2)
    shape_c = (1 + s_c / wz1) * (1 + s_c / wz2) / ((1 + s_c / wp1) * (1 + s_c / wp2)) / s_c
    shape_c = shape_c * sampling(s_c)
    w_i = 1.0 / abs(plant_c * shape_c)
    return w_i * plant * shape


def tank_loop(frequency_hz: np.ndarray) -> np.ndarray:
    """Invented loop gain H of a tuned-amplifier oscillator (positive feedback).

    An LC tank at 2.5 MHz with loaded Q 40 in a non-inverting amplifier's path, a
    feedback divider and a 60 MHz amplifier pole; the round-trip gain at the tank's
    peak is 1.4.
    """
    s = 2j * np.pi * frequency_hz
    w0, q = 2 * np.pi * 2.5e6, 40.0
    tank = (s * w0 / q) / (s**2 + s * w0 / q + w0**2)
    amplifier_pole = 1.0 / (1 + s / (2 * np.pi * 60e6))
    return 1.4 * tank * amplifier_pole


def _log_sweep(start_hz: float, stop_hz: float, per_decade: int) -> np.ndarray:
    points = round(float(np.log10(stop_hz / start_hz)) * per_decade) + 1
    return np.logspace(np.log10(start_hz), np.log10(stop_hz), points)


def _write_polar(path: Path, f: np.ndarray, h: np.ndarray, gain_std_db: float,
                 phase_std_deg: float, rng: np.random.Generator) -> None:
    gain_db = 20 * np.log10(np.abs(h)) + rng.normal(0.0, gain_std_db, f.size)
    phase_deg = np.angle(h, deg=True) + rng.normal(0.0, phase_std_deg, f.size)
    phase_deg = np.remainder(phase_deg + 180.0, 360.0) - 180.0
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(["frequency_hz", "gain_db", "phase_deg", "gain_db_std", "phase_deg_std"])
        for row in zip(f, gain_db, phase_deg, strict=True):
            writer.writerow([f"{row[0]:.6f}", f"{row[1]:.5f}", f"{row[2]:.4f}",
                             f"{gain_std_db:g}", f"{phase_std_deg:g}"])


def main() -> None:
    """Write every example response."""
    rng = np.random.default_rng(20261201)
    f = _log_sweep(100.0, 1e6, 20)
    measured = -buck_loop(f)  # H = -L: the round trip includes the loop's inversion
    _write_polar(HERE / "buck_loop_response.csv", f, measured, 0.01, 0.05, rng)
    _write_polar(HERE / "buck_loop_response_noisy.csv", f, measured, 0.1, 0.5, rng)

    f = _log_sweep(1e6, 1e7, 40)
    h = tank_loop(f)
    with (HERE / "tank_oscillator_loop_response.csv").open("w", newline="") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(["frequency_hz", "gain_re", "gain_im"])
        for row in zip(f, h.real, h.imag, strict=True):
            writer.writerow([f"{row[0]:.6f}", f"{row[1]:.12e}", f"{row[2]:.12e}"])


if __name__ == "__main__":
    main()
