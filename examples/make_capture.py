"""Write the example two-channel captures used by ``loopwright ratio`` demos and docs.

INVENTED SCENARIO, for demonstration only: a 5 V buck regulator's voltage loop probed
by injection across a 20 ohm resistor, at 12.5 kHz, near its gain crossover. The
values below (loop gain 1.12 at -128 deg, i.e. a phase margin of about 52 deg for
H = -L, 2 MS/s scope, 150 ppm clock offset between generator and scope, noise and a
little second/third harmonic on the response) are made up; no real circuit was
measured.

Run ``python examples/make_capture.py`` to regenerate:

- ``capture_regulator_12k5.csv``: header ``time_s,reference_v,response_v``
  (with ``#`` comment lines first);
- ``capture_regulator_12k5.npz``: ``reference_v``, ``response_v``, ``sample_rate_hz``.

Expected: ``loopwright ratio examples/capture_regulator_12k5.csv --frequency 12500``
gives about 0.98 dB and -128 deg.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SAMPLE_RATE_HZ = 2.0e6
N_SAMPLES = 16_000  # 100 cycles of 12.5 kHz (but the clock offset makes it 100.015)
STIMULUS_HZ = 12_500.0
CLOCK_OFFSET_PPM = 150.0
LOOP_GAIN = 1.12 * np.exp(1j * np.radians(-128.0))  # invented


def make(seed: int = 12_500) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Time, reference and response of the invented capture."""
    rng = np.random.default_rng(seed)
    t = np.arange(N_SAMPLES) / SAMPLE_RATE_HZ
    f_true = STIMULUS_HZ * (1 + CLOCK_OFFSET_PPM * 1e-6)
    arg = 2 * np.pi * f_true * t + 0.7
    ref_amp = 0.040  # 40 mV injected across the loop break
    ref = ref_amp * np.cos(arg) + 5.0 + 0.4e-3 * rng.standard_normal(N_SAMPLES)
    resp_amp = ref_amp * abs(LOOP_GAIN)
    resp_arg = arg + np.angle(LOOP_GAIN)
    resp = (
        resp_amp * np.cos(resp_arg)
        + 0.02 * resp_amp * np.cos(2 * resp_arg + 0.3)
        + 0.008 * resp_amp * np.cos(3 * resp_arg - 1.0)
        + 5.0
        + 0.6e-3 * rng.standard_normal(N_SAMPLES)
    )
    return t, ref, resp


def main() -> None:
    t, ref, resp = make()
    csv_path = HERE / "capture_regulator_12k5.csv"
    with csv_path.open("w", encoding="utf-8") as fh:
        fh.write("# INVENTED example capture (examples/make_capture.py): not a measurement\n")
        fh.write("# buck regulator voltage loop, injection at 12.5 kHz, 2 MS/s\n")
        fh.write("time_s,reference_v,response_v\n")
        for row in zip(t.tolist(), ref.tolist(), resp.tolist(), strict=True):
            fh.write("{:.9e},{:.7e},{:.7e}\n".format(*row))
    np.savez_compressed(
        HERE / "capture_regulator_12k5.npz",
        reference_v=ref,
        response_v=resp,
        sample_rate_hz=np.float64(SAMPLE_RATE_HZ),
        note=np.array("INVENTED example capture (examples/make_capture.py): not a measurement"),
    )
    print(f"wrote {csv_path.name} and capture_regulator_12k5.npz in {HERE}")


if __name__ == "__main__":
    main()
