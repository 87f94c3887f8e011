"""``loopwright analyze RESPONSE.csv``: loop figures of a stored frequency response.

Prints a table (crossovers, margins, Barkhausen verdict, resonances) or, with
``--json``, the dictionary of :meth:`loopwright.analysis.LoopFigures.to_dict`.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from rich.console import Console
from rich.markup import escape
from rich.table import Table

from loopwright.analysis import FrequencyResponse, LoopFigures, analyze_loop


def register(subparsers: Any) -> None:
    """Add the ``analyze`` command."""
    parser = subparsers.add_parser(
        "analyze",
        help="loop figures (margins, Barkhausen points, Q) of a response CSV",
        description=(
            "Phase and gain margins, zero-phase crossings with the Barkhausen verdict, "
            "resonances and bandwidth of a frequency response stored as CSV "
            "(frequency_hz with gain_db,phase_deg or gain_re,gain_im; optional "
            "gain_db_std,phase_deg_std). H is the round trip around the loop, every "
            "inversion included (negative feedback: H = -L)."
        ),
    )
    parser.add_argument("response", metavar="RESPONSE.csv", help="the response file")
    parser.add_argument(
        "--sign", type=int, choices=(1, -1), default=1,
        help="-1 flips H, for probing that leaves the loop's inversion out (default 1)",
    )
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Analyse the file and print the result; returns the exit code."""
    response = FrequencyResponse.from_csv(args.response)
    figures = analyze_loop(response, sign=args.sign)
    if args.json:
        json.dump(figures.to_dict(), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print_figures(figures, args.response, Console())
    return 0


def _pm(value: float, std: float) -> str:
    return f"{value:.2f} ± {std:.2f}"


def _hz(value: float) -> str:
    text = f"{value:.6g}"
    return f"{value:,.0f}" if "e" in text else text


def print_figures(figures: LoopFigures, name: str, console: Console) -> None:
    """Print ``figures`` as readable tables on ``console``."""
    low, high = figures.frequency_range_hz
    console.print(
        f"[bold]{escape(name)}[/bold]: {figures.points} points, {low:g} to {high:g} Hz, "
        f"sign {figures.sign:+d}, interpolation {figures.interpolation} "
        f"({figures.interpolation_note})"
    )
    summary = Table(title="Loop figures", show_header=False)
    summary.add_column("figure")
    summary.add_column("value", justify="right")
    pm, gm, osc = figures.worst_crossover, figures.worst_zero_phase, figures.oscillation
    summary.add_row(
        "phase margin (worst)",
        "not reached" if pm is None else
        f"{_pm(pm.phase_margin_deg, pm.phase_margin_deg_std)} deg at {_hz(pm.frequency_hz)} Hz",
    )
    summary.add_row(
        "gain margin (worst)",
        "not reached" if gm is None else
        f"{_pm(gm.gain_margin_db, gm.gain_margin_db_std)} dB at {_hz(gm.frequency_hz)} Hz",
    )
    summary.add_row(
        "oscillation predicted",
        "no" if osc is None else
        f"yes, at {_hz(osc.frequency_hz)} Hz, excess gain {osc.loop_gain:.4g}",
    )
    summary.add_row(
        "-3 dB bandwidth",
        "does not apply" if figures.bandwidth_hz is None else f"{_hz(figures.bandwidth_hz)} Hz",
    )
    console.print(summary)

    crossings = Table(title="Crossings")
    for column in ("kind", "frequency (Hz)", "|H|", "phase margin (deg)", "gain margin (dB)",
                   "Barkhausen"):
        crossings.add_column(column, justify="right")
    for c in figures.gain_crossovers:
        crossings.add_row("gain 1", _hz(c.frequency_hz), "1",
                          _pm(c.phase_margin_deg, c.phase_margin_deg_std), "", "")
    for z in figures.zero_phase_crossings:
        crossings.add_row("phase 0", _hz(z.frequency_hz), f"{z.loop_gain:.4g}", "",
                          _pm(z.gain_margin_db, z.gain_margin_db_std),
                          "met" if z.barkhausen_met else "not met")
    if crossings.row_count:
        console.print(crossings)
    else:
        console.print("No crossing of |H| = 1 or angle(H) = 0 inside the swept range.")

    if figures.resonances:
        peaks = Table(title="Resonances")
        for column in ("frequency (Hz)", "peak (dB)", "Q", "from", "-3 dB width (Hz)"):
            peaks.add_column(column, justify="right")
        for r in figures.resonances:
            peaks.add_row(
                _hz(r.frequency_hz), f"{r.peak_db:.2f}",
                "" if r.q is None else f"{r.q:.3g}", r.q_method or "",
                "" if r.bandwidth_hz is None else f"{r.bandwidth_hz:,.4g}",
            )
        console.print(peaks)
