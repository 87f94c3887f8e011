"""Colours, marker shapes and line styles of every loopwright plot.

All colours come from the colour-blind-safe set of Okabe and Ito ("Color Universal
Design", 2008; the same eight values are printed in B. Wong, "Points of view: Color
blindness", Nature Methods 8:441, 2011). The two traces of a Bode plot differ in
lightness as well as in hue (CIE L* about 0 against 56), so they stay apart on a
greyscale print; flagged points differ in marker shape as well as in colour, and the
limit masks are hatched, not only tinted. The two traces avoid the yellow, cyan,
magenta and blue that bench screens use for their channels, so nobody reads a trace
as "channel 1".
"""

from __future__ import annotations

from itertools import cycle, islice

# Okabe-Ito values (hex as published).
BLACK = "#000000"
ORANGE = "#E69F00"
SKY_BLUE = "#56B4E9"
BLUISH_GREEN = "#009E73"
YELLOW = "#F0E442"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
REDDISH_PURPLE = "#CC79A7"

#: The gain trace (dark) and the phase trace (mid lightness).
GAIN_COLOUR = BLACK
PHASE_COLOUR = VERMILLION
#: Reference lines (0 dB, 0 deg) and crossover markers.
GUIDE_COLOUR = "#555555"
#: Limit masks: a light grey fill with a hatch, so they survive greyscale printing.
MASK_FILL = "#D9D9D9"
MASK_EDGE = "#7F7F7F"
MASK_HATCH = "///"

#: One (colour, marker, label) per quality flag of points.csv.
FLAG_STYLES: dict[str, dict[str, str]] = {
    "clipped": {"colour": REDDISH_PURPLE, "marker": "^", "label": "clipped"},
    "low_snr": {"colour": BLUE, "marker": "s", "label": "low SNR"},
    "nonlinear": {"colour": ORANGE, "marker": "D", "label": "non-linear"},
    "unsettled": {"colour": BLUISH_GREEN, "marker": "v", "label": "unsettled"},
}

#: Overlay colours for several runs on one plot, alternating dark and light.
RUN_COLOURS = (BLACK, ORANGE, BLUE, VERMILLION, SKY_BLUE, BLUISH_GREEN, REDDISH_PURPLE)
#: Overlay line styles; 4 is coprime with 7 so 28 runs get distinct pairs.
RUN_LINESTYLES = ("-", "--", "-.", ":")

#: Verdict colours in the HTML report (text is always printed beside them).
PASS_COLOUR = BLUISH_GREEN
FAIL_COLOUR = VERMILLION
NONE_COLOUR = "#7F7F7F"


def run_styles(count: int) -> list[tuple[str, str]]:
    """Distinct (colour, line style) pairs for ``count`` overlaid runs.

    Colours and styles cycle with coprime periods (7 and 4), so the first 28 pairs
    are all different.
    """
    colours = islice(cycle(RUN_COLOURS), count)
    styles = islice(cycle(RUN_LINESTYLES), count)
    return list(zip(colours, styles, strict=False))


def _srgb_to_linear(channel: float) -> float:
    # IEC 61966-2-1 (sRGB) transfer function.
    if channel <= 0.04045:
        return channel / 12.92
    return ((channel + 0.055) / 1.055) ** 2.4


def lightness(hex_colour: str) -> float:
    """CIE 1976 L* (0 black .. 100 white) of an sRGB colour ``#RRGGBB``.

    Relative luminance Y from the sRGB primaries (IEC 61966-2-1), then
    L* = 116 f(Y) - 16 (CIE 15:2004).
    """
    value = hex_colour.lstrip("#")
    r, g, b = (int(value[i : i + 2], 16) / 255.0 for i in (0, 2, 4))
    y = (
        0.2126 * _srgb_to_linear(r)
        + 0.7152 * _srgb_to_linear(g)
        + 0.0722 * _srgb_to_linear(b)
    )
    f = y ** (1 / 3) if y > (6 / 29) ** 3 else y / (3 * (6 / 29) ** 2) + 4 / 29
    return 116 * f - 16
