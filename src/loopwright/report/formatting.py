"""Numbers as an engineer reads them: engineering prefixes, fixed decimals, units."""

from __future__ import annotations

import math

_PREFIXES = ((1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "µ"), (1e-9, "n"))


def is_number(value: object) -> bool:
    """True for a finite int or float (bools and None are not numbers here)."""
    if isinstance(value, bool) or value is None:
        return False
    if not isinstance(value, (int, float)):
        return False
    return math.isfinite(float(value))


def engineering(value: float | None, unit: str, digits: int = 4) -> str:
    """``value`` with an SI prefix and ``digits`` significant digits: ``12.35 kHz``.

    Non-finite or missing values give an en dash.
    """
    if not is_number(value):
        return "–"
    value = float(value)
    if value == 0.0:
        return f"0 {unit}".strip()
    magnitude = abs(value)
    scale, prefix = _PREFIXES[-1]
    for candidate_scale, candidate_prefix in _PREFIXES:
        if magnitude >= candidate_scale * 0.9995:
            scale, prefix = candidate_scale, candidate_prefix
            break
    scaled = value / scale
    # the exponent after rounding: 0.99996 k shows as 1.000 k, not 1.0000 k
    rounded = float(f"{scaled:.{digits - 1}e}")
    decimals = max(0, digits - 1 - math.floor(math.log10(abs(rounded))))
    return f"{scaled:.{decimals}f} {prefix}{unit}".strip()


def fixed(value: float | None, decimals: int = 2, unit: str = "") -> str:
    """``value`` with fixed decimals and an optional unit; an en dash when missing."""
    if not is_number(value):
        return "–"
    text = f"{float(value):.{decimals}f}"
    return f"{text} {unit}".strip() if unit else text


def degrees(value: float | None, decimals: int = 2) -> str:
    """An angle with a degree sign (``27.14°``); an en dash when missing."""
    return fixed(value, decimals) + "°" if is_number(value) else "–"


def figure_value(value: float | None, unit: str | None) -> str:
    """A limit's value in its own unit: Hz and V get prefixes, the rest fixed decimals."""
    unit = unit or ""
    if unit in ("Hz", "V", "s", "A"):
        return engineering(value, unit)
    if unit == "deg":
        return degrees(value)
    if unit == "%":
        return fixed(value, 3, "%")
    return fixed(value, 3, unit)
