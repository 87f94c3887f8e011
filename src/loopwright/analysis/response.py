"""A measured frequency response: frequencies, complex loop gain, per-point uncertainty.

:class:`FrequencyResponse` holds ``frequency_hz`` (strictly increasing, positive) and
the complex gain ``h`` (``H = response / reference``, the round trip around the loop),
with optional per-point standard deviations of gain (dB) and phase (deg). It is built
from arrays or read from a CSV file; every bad input ends in
:class:`loopwright.errors.InputError` that names the file, line and column.

CSV layout: a header line, then one point per line. Required columns are
``frequency_hz`` and either ``gain_db,phase_deg`` or ``gain_re,gain_im`` (when both
pairs are present the exact ``gain_re,gain_im`` pair is used). Optional columns
``gain_db_std,phase_deg_std`` (a column with a blank or ``nan`` cell is treated as
unknown and dropped); any other column is ignored, so a run's ``points.csv`` of one
sweep step loads as it is. Blank lines and lines starting with ``#`` are skipped.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike, NDArray

from loopwright.errors import InputError

if TYPE_CHECKING:
    from loopwright.analysis.interpolate import ResponseModel

FloatArray = NDArray[np.float64]
ComplexArray = NDArray[np.complex128]

_POLAR = ("gain_db", "phase_deg")
_RECT = ("gain_re", "gain_im")
_STD = ("gain_db_std", "phase_deg_std")


@dataclass(frozen=True)
class _Problem:
    """The first bad point found by :func:`_find_problem`."""

    index: int
    field: str
    message: str


def _readonly(values: ArrayLike, dtype: type) -> NDArray:
    array = np.array(values, dtype=dtype, copy=True)
    array.setflags(write=False)
    return array


def _find_problem(
    frequency_hz: FloatArray,
    h: ComplexArray,
    gain_db_std: FloatArray | None,
    phase_deg_std: FloatArray | None,
) -> _Problem | None:
    """The first point that breaks a rule, or None when the arrays are valid."""
    for index, value in enumerate(frequency_hz):
        if not math.isfinite(value):
            return _Problem(index, "frequency_hz", f"frequency is {value}, not a finite number")
        if value <= 0.0:
            return _Problem(index, "frequency_hz", f"frequency {value:g} Hz is not positive")
        if index and value == frequency_hz[index - 1]:
            return _Problem(
                index, "frequency_hz", f"duplicate frequency {value:g} Hz (previous point)"
            )
        if index and value < frequency_hz[index - 1]:
            return _Problem(
                index,
                "frequency_hz",
                f"frequency {value:g} Hz is below the previous point's "
                f"{frequency_hz[index - 1]:g} Hz; points must be sorted by frequency",
            )
    for index, value in enumerate(h):
        if not (math.isfinite(value.real) and math.isfinite(value.imag)):
            return _Problem(index, "gain", f"gain is {value}, not a finite number")
        if value == 0:
            return _Problem(index, "gain", "gain is zero (minus infinity dB)")
    for name, std in (("gain_db_std", gain_db_std), ("phase_deg_std", phase_deg_std)):
        if std is None:
            continue
        for index, value in enumerate(std):
            if not math.isfinite(value) or value < 0.0:
                return _Problem(index, name, f"standard deviation {value} is not a finite >= 0")
    return None


class FrequencyResponse:
    """Complex loop gain measured at a set of frequencies.

    Parameters
    ----------
    frequency_hz
        Frequencies in Hz, positive and strictly increasing, at least 2.
    h
        Complex gain at each frequency (``H = response / reference``).
    gain_db_std, phase_deg_std
        Optional standard deviation of each point's gain (dB) and phase (deg).

    Raises
    ------
    InputError
        Arrays of different lengths, fewer than 2 points, NaN or infinite values,
        non-positive, unsorted or duplicate frequencies, a zero gain, a negative std.

    Examples
    --------
    >>> r = FrequencyResponse.from_gain_phase([1e3, 1e4], [6.0, -6.0], [170.0, 120.0])
    >>> [round(float(g), 3) for g in r.gain_db]
    [6.0, -6.0]
    """

    def __init__(
        self,
        frequency_hz: ArrayLike,
        h: ArrayLike,
        gain_db_std: ArrayLike | None = None,
        phase_deg_std: ArrayLike | None = None,
        *,
        source: str | None = None,
    ) -> None:
        try:
            f = _readonly(frequency_hz, np.float64)
            gain = _readonly(h, np.complex128)
            g_std = None if gain_db_std is None else _readonly(gain_db_std, np.float64)
            p_std = None if phase_deg_std is None else _readonly(phase_deg_std, np.float64)
        except (TypeError, ValueError) as exc:
            raise InputError(f"not numeric arrays: {exc}", path=source) from exc
        for name, array in (("frequency_hz", f), ("h", gain), ("gain_db_std", g_std),
                            ("phase_deg_std", p_std)):
            if array is not None and array.ndim != 1:
                raise InputError(f"expected a 1-D array, got shape {array.shape}",
                                 path=source, field=name)
            if array is not None and array.shape != f.shape:
                raise InputError(
                    f"has {array.size} values but frequency_hz has {f.size}",
                    path=source, field=name,
                )
        if f.size < 2:
            raise InputError(
                f"a frequency response needs at least 2 points, got {f.size}", path=source
            )
        problem = _find_problem(f, gain, g_std, p_std)
        if problem is not None:
            raise InputError(f"point {problem.index}: {problem.message}", path=source,
                             field=problem.field)
        self.frequency_hz: FloatArray = f
        self.h: ComplexArray = gain
        self.gain_db_std: FloatArray | None = g_std
        self.phase_deg_std: FloatArray | None = p_std
        self.source = source
        self._model: ResponseModel | None = None

    # -- constructors ---------------------------------------------------------------
    @classmethod
    def from_gain_phase(
        cls,
        frequency_hz: ArrayLike,
        gain_db: ArrayLike,
        phase_deg: ArrayLike,
        gain_db_std: ArrayLike | None = None,
        phase_deg_std: ArrayLike | None = None,
    ) -> FrequencyResponse:
        """Build from gain in dB and phase in degrees."""
        g = np.asarray(gain_db, dtype=np.float64)
        p = np.asarray(phase_deg, dtype=np.float64)
        if g.shape != p.shape:
            raise InputError(f"gain_db has shape {g.shape} but phase_deg has {p.shape}")
        h = 10.0 ** (g / 20.0) * np.exp(1j * np.deg2rad(p))
        return cls(frequency_hz, h, gain_db_std, phase_deg_std)

    @classmethod
    def from_csv(cls, path: str | Path) -> FrequencyResponse:
        """Read a response from a CSV file (see the module docstring for the columns).

        Raises
        ------
        InputError
            The file cannot be read, a column is missing, a cell is not a number, or a
            point breaks a rule of the constructor; the message names file and line.
        """
        path = Path(path)
        try:
            text = path.read_text(encoding="utf-8-sig")
        except FileNotFoundError as exc:
            raise InputError("no such file", path=path) from exc
        except UnicodeDecodeError as exc:
            raise InputError("not a UTF-8 text file", path=path) from exc
        except OSError as exc:
            raise InputError(f"cannot read: {exc.strerror or exc}", path=path) from exc
        return _parse_csv(text.splitlines(), path)

    # -- views ------------------------------------------------------------------------
    def __len__(self) -> int:
        return int(self.frequency_hz.size)

    def __repr__(self) -> str:
        return (
            f"FrequencyResponse({len(self)} points, {self.frequency_hz[0]:g}.."
            f"{self.frequency_hz[-1]:g} Hz)"
        )

    @property
    def gain_db(self) -> FloatArray:
        """Gain in dB, ``20 log10 |H|``."""
        return 20.0 * np.log10(np.abs(self.h))

    @property
    def phase_deg(self) -> FloatArray:
        """Phase of H in degrees, wrapped to (-180, 180]."""
        return wrap_deg(np.angle(self.h, deg=True))

    @property
    def has_uncertainty(self) -> bool:
        """True when per-point standard deviations were given."""
        return self.gain_db_std is not None or self.phase_deg_std is not None

    def flipped(self, sign: int) -> FrequencyResponse:
        """The same response multiplied by ``sign`` (+1 or -1)."""
        if sign not in (1, -1):
            raise InputError(f"sign must be 1 or -1, got {sign!r}", field="sign")
        if sign == 1:
            return self
        return FrequencyResponse(
            self.frequency_hz, -self.h, self.gain_db_std, self.phase_deg_std,
            source=self.source,
        )

    def model(self) -> ResponseModel:
        """The interpolation model of this response (built once, then cached)."""
        from loopwright.analysis.interpolate import build_model

        if self._model is None:
            self._model = build_model(self.frequency_hz, self.h)
        return self._model

    def interpolate(self, frequency_hz: ArrayLike) -> ComplexArray:
        """Complex H at ``frequency_hz`` by the model the loop figures use.

        Raises
        ------
        InputError
            A frequency lies outside the swept range (no extrapolation).
        """
        f = np.asarray(frequency_hz, dtype=np.float64)
        lo, hi = self.frequency_hz[0], self.frequency_hz[-1]
        if np.any(~np.isfinite(f)) or np.any(f < lo * (1 - 1e-12)) or np.any(
            f > hi * (1 + 1e-12)
        ):
            raise InputError(
                f"frequencies must lie inside the swept range {lo:g}..{hi:g} Hz",
                field="frequency_hz",
            )
        return self.model()(np.clip(f, lo, hi))


def wrap_deg(angle_deg: ArrayLike) -> FloatArray:
    """Wrap angles in degrees to (-180, 180]."""
    a = np.asarray(angle_deg, dtype=np.float64)
    wrapped = np.remainder(a + 180.0, 360.0) - 180.0
    return np.where(wrapped == -180.0, 180.0, wrapped)


def _parse_float(cell: str, path: Path, line: int, column: str) -> float:
    try:
        value = float(cell)
    except ValueError:
        raise InputError(f"{cell.strip()!r} is not a number", path=path, line=line,
                         field=column) from None
    if not math.isfinite(value):
        raise InputError(f"{cell.strip()!r} is not a finite number", path=path, line=line,
                         field=column)
    return value


def _parse_csv(lines: Sequence[str], path: Path) -> FrequencyResponse:
    rows: list[tuple[int, list[str]]] = []
    for number, row in enumerate(csv.reader(lines), start=1):
        if not row or not "".join(row).strip() or row[0].lstrip().startswith("#"):
            continue
        rows.append((number, row))
    if not rows:
        raise InputError("empty file: expected a header line and points", path=path)
    header_line, header = rows[0]
    names = [name.strip() for name in header]
    column = {name: i for i, name in enumerate(names) if name}
    if "frequency_hz" not in column:
        raise InputError(
            "missing column 'frequency_hz' (header must name frequency_hz and either "
            "gain_db,phase_deg or gain_re,gain_im)",
            path=path, line=header_line,
        )
    if all(name in column for name in _RECT):
        pair = _RECT
    elif all(name in column for name in _POLAR):
        pair = _POLAR
    else:
        missing = [n for n in (_POLAR if any(n in column for n in _POLAR) else _RECT)
                   if n not in column]
        raise InputError(
            f"missing column {missing[0]!r} (need gain_db,phase_deg or gain_re,gain_im)",
            path=path, line=header_line,
        )
    wanted = ["frequency_hz", *pair, *[n for n in _STD if n in column]]
    points = len(rows) - 1
    values = {name: np.empty(points) for name in wanted}
    line_of = np.empty(points, dtype=int)
    for k, (number, row) in enumerate(rows[1:]):
        if len(row) != len(header):
            raise InputError(
                f"has {len(row)} cells but the header has {len(header)}",
                path=path, line=number,
            )
        line_of[k] = number
        for name in wanted:
            cell = row[column[name]]
            if name in _STD and cell.strip().lower() in ("", "nan"):
                values[name][k] = np.nan  # unknown std: the column is dropped below
                continue
            values[name][k] = _parse_float(cell, path, number, name)
    if points < 2:
        raise InputError(f"a frequency response needs at least 2 points, got {points}",
                         path=path)
    if pair == _RECT:
        h = values["gain_re"] + 1j * values["gain_im"]
    else:
        h = 10.0 ** (values["gain_db"] / 20.0) * np.exp(1j * np.deg2rad(values["phase_deg"]))
    g_std, p_std = (values.get(name) for name in _STD)
    g_std = None if g_std is None or np.isnan(g_std).any() else g_std
    p_std = None if p_std is None or np.isnan(p_std).any() else p_std
    problem = _find_problem(values["frequency_hz"], h, g_std, p_std)
    if problem is not None:
        field = problem.field if problem.field != "gain" else ",".join(pair)
        raise InputError(problem.message, path=path, line=int(line_of[problem.index]),
                         field=field)
    return FrequencyResponse(values["frequency_hz"], h, g_std, p_std, source=str(path))
