"""Accuracy and speed of the analysis layer (a script, not a test).

Accuracy: for seeded random loops of order up to 6 (lightly damped pairs included),
sampled at 8 points per decade over 6 decades, the largest error of crossover
frequency, phase margin and gain margin against python-control's
``stability_margins`` on the exact transfer function, for three interpolations:
the AAA rational model, PCHIP in log f (the fallback), and straight lines in log f.

Speed: wall time of ``analyze_loop`` for exact and noisy responses of 33..2001 points.

Run: ``python3 benchmarks/bench_analysis.py [--loops 100]``. On a machine shared with
other jobs, set ``OPENBLAS_NUM_THREADS=1``: the rational fit's small SVDs slow down by
two orders of magnitude when BLAS threads compete for busy cores.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy.interpolate import PchipInterpolator
from scipy.optimize import brentq

from loopwright.analysis import FrequencyResponse, analyze_loop

F_SCALE_HZ = 1e4

# the same seeded loops as tests/test_analysis_margins.py
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from random_loops import random_loop  # noqa: E402


def simple_figures(f: np.ndarray, h: np.ndarray, kind: str) -> tuple[list, list]:
    """Crossovers (f, PM) and zero-phase crossings (f, GM dB) by a plain interpolant."""
    x = np.log(f)
    g = 20 * np.log10(np.abs(h))
    p = np.unwrap(np.angle(h))
    if kind == "pchip":
        gi, pi = PchipInterpolator(x, g), PchipInterpolator(x, p)
    else:
        def gi(t):
            return np.interp(t, x, g)

        def pi(t):
            return np.interp(t, x, p)
    cross = []
    for i in np.where(np.diff(np.sign(g)) != 0)[0]:
        t = brentq(gi, x[i], x[i + 1])
        cross.append((np.exp(t), np.degrees((pi(t) + np.pi) % (2 * np.pi) - np.pi)))
    zeros = []
    s = np.sin(p)
    for i in np.where(np.diff(np.sign(s)) != 0)[0]:
        t = brentq(lambda u: np.sin(pi(u)), x[i], x[i + 1])
        if np.cos(pi(t)) > 0:
            zeros.append((np.exp(t), -float(gi(t))))
    return cross, zeros


def accuracy(loops: int) -> None:
    import control

    rng = np.random.default_rng(1)
    f = np.logspace(-3, 3, 49) * F_SCALE_HZ
    worst = {k: np.zeros(3) for k in ("aaa", "pchip", "linear")}
    used = {"aaa": 0, "pchip": 0}
    miscounted = dict.fromkeys(worst, 0)
    counted = 0
    while counted < loops:
        system = random_loop(rng)
        gm, pm, _sm, w180, wc, _ws = control.stability_margins(system, returnall=True)
        wc, w180 = np.atleast_1d(wc), np.atleast_1d(w180)
        pm, gm = np.atleast_1d(pm), np.atleast_1d(gm)
        lo, hi = f[0] / F_SCALE_HZ, f[-1] / F_SCALE_HZ
        edge = np.concatenate([wc, w180])
        if np.any((np.abs(edge / lo - 1) < 0.05) | (np.abs(edge / hi - 1) < 0.05)):
            continue
        ic = (wc > lo) & (wc < hi)
        i180 = (w180 > lo) & (w180 < hi)
        ref_c = sorted(zip(wc[ic] * F_SCALE_HZ, pm[ic], strict=True))
        ref_z = sorted(zip(w180[i180] * F_SCALE_HZ, 20 * np.log10(gm[i180]), strict=True))
        h = -np.asarray(system(1j * f / F_SCALE_HZ))
        figures = analyze_loop(FrequencyResponse(f, h))
        used[figures.interpolation] += 1
        results = {
            "aaa": ([(c.frequency_hz, c.phase_margin_deg) for c in figures.gain_crossovers],
                    [(z.frequency_hz, z.gain_margin_db) for z in figures.zero_phase_crossings]),
            "pchip": simple_figures(f, h, "pchip"),
            "linear": simple_figures(f, h, "linear"),
        }
        for kind, (cross, zeros) in results.items():
            if len(cross) != len(ref_c) or len(zeros) != len(ref_z):
                miscounted[kind] += 1
                continue
            for (fm, pmm), (fr, pmr) in zip(cross, ref_c, strict=True):
                worst[kind][0] = max(worst[kind][0], abs(fm / fr - 1))
                worst[kind][1] = max(worst[kind][1], abs(pmm - pmr))
            for (_fm, gmm), (_fr, gmr) in zip(zeros, ref_z, strict=True):
                worst[kind][2] = max(worst[kind][2], abs(gmm - gmr))
        counted += 1
    print(f"accuracy, {loops} random loops, 8 points/decade over 6 decades "
          f"(model used: {used}), worst error vs python-control:")
    print(f"{'interpolation':>14} {'crossover f':>12} {'PM (deg)':>10} {'GM (dB)':>10} "
          f"{'loops with crossings missed or extra':>38}")
    for kind, (ef, ep, eg) in worst.items():
        print(f"{kind:>14} {ef * 100:>11.2e}% {ep:>10.2e} {eg:>10.2e} {miscounted[kind]:>38}")
    print("   requirement        0.3 %        0.2       0.05")


def speed() -> None:
    rng = np.random.default_rng(2)
    print("\nspeed of analyze_loop (median of 5, ms):")
    print(f"{'points':>7} {'exact':>8} {'noisy':>8}")
    for n in (33, 81, 401, 2001):
        f = np.logspace(-2, 2, n) * F_SCALE_HZ
        s = 1j * f / F_SCALE_HZ
        h = -2 / (s * (s + 1) * (s + 2))
        noisy = h * 10 ** (rng.normal(0, 0.1, n) / 20)
        row = []
        for data in (h, noisy):
            times = []
            for _ in range(5):
                start = time.perf_counter()
                analyze_loop(FrequencyResponse(f, data))
                times.append(time.perf_counter() - start)
            row.append(1e3 * float(np.median(times)))
        print(f"{n:>7} {row[0]:>8.1f} {row[1]:>8.1f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--loops", type=int, default=100)
    args = parser.parse_args()
    accuracy(args.loops)
    speed()


if __name__ == "__main__":
    main()
