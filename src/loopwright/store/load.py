"""Reading a run folder back: manifest, points, summary, calibration, response.

``load_run(path)`` is the one entry point; it checks that the folder is a run of this
format and reads its files. The frequency response is built on demand from
points.csv (the analysis module is imported only then), and ``to_frd()`` gives
python-control's ``FrequencyResponseData`` when the optional extra is installed.
"""

from __future__ import annotations

import io
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from loopwright.errors import InputError, RunError
from loopwright.store.writer import (
    CALIBRATION_COLUMNS,
    CALIBRATION_FILE,
    FORMAT,
    MANIFEST_FILE,
    POINT_COLUMNS,
    POINTS_FILE,
    SUMMARY_FILE,
)


def _read_json(path: Path) -> Any:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise InputError("file not found", path=path) from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read the file: {exc}", path=path) from exc
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"not valid JSON: {exc.msg}", path=path, line=exc.lineno) from exc


def read_manifest(path: str | Path) -> dict[str, Any]:
    """The manifest of a run folder, checked to be one of ours.

    Raises
    ------
    InputError
        ``path`` is not a folder, has no manifest.json, or the manifest is not JSON of
        the ``loopwright-run/1`` format.
    """
    folder = Path(path)
    if not folder.is_dir():
        raise InputError("not a folder (give a run folder, runs/<time>_<procedure>_<serial>)",
                         path=folder)
    target = folder / MANIFEST_FILE
    if not target.exists():
        raise InputError("not a run folder: it has no manifest.json", path=folder)
    manifest = _read_json(target)
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        found = manifest.get("format") if isinstance(manifest, dict) else None
        raise InputError(f"not a run manifest: format is {found!r}, expected {FORMAT!r}",
                         path=target, field="format")
    return manifest


def read_points(path: str | Path) -> pd.DataFrame:
    """points.csv as a DataFrame (empty, with the columns, if the run stored no point).

    A torn last row (a run killed mid-write) is left out, not repaired; use
    ``RunFolder.open_for_resume`` to repair the file.
    """
    target = Path(path)
    if target.is_dir():
        target = target / POINTS_FILE
    if not target.exists():
        return pd.DataFrame({c: pd.Series(dtype=_dtype(c)) for c in POINT_COLUMNS})
    try:
        raw = target.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read the file: {exc.strerror}", path=target) from exc
    raw = raw[: raw.rfind(b"\n") + 1]
    header = raw.split(b"\n", 1)[0].decode("utf-8", errors="replace")
    if raw and header != ",".join(POINT_COLUMNS):
        raise InputError("the header is not loopwright's points.csv header",
                         path=target, line=1)
    if not raw:
        return pd.DataFrame({c: pd.Series(dtype=_dtype(c)) for c in POINT_COLUMNS})
    try:
        frame = pd.read_csv(io.BytesIO(raw), dtype={"timestamp_utc": str, "flags": str},
                            keep_default_na=False,
                            na_values={c: ["", "nan", "NaN"] for c in POINT_COLUMNS
                                       if c not in ("timestamp_utc", "flags")})
    except (ValueError, pd.errors.ParserError) as exc:
        raise InputError(f"cannot read points: {exc}", path=target) from exc
    if list(frame.columns) != list(POINT_COLUMNS):
        raise InputError("unexpected columns in points.csv", path=target, line=1)
    for column in POINT_COLUMNS:
        if column in ("timestamp_utc", "flags"):
            continue
        numbers = pd.to_numeric(frame[column], errors="coerce")
        bad = numbers.isna() & frame[column].notna()
        if column in ("index", "step", "refined"):
            bad |= numbers.isna() | (numbers != numbers.round())
        if bad.any():
            row = int(bad.to_numpy().nonzero()[0][0])
            raise InputError(f"{frame[column].iloc[row]!r} is not a number here",
                             path=target, line=row + 2, field=column)
        frame[column] = numbers.astype(_dtype(column))
    return frame


def _dtype(column: str) -> str:
    if column in ("timestamp_utc", "flags"):
        return "object"
    if column in ("index", "step", "refined"):
        return "int64"
    return "float64"


def read_calibration(path: str | Path) -> tuple[np.ndarray, np.ndarray]:
    """calibration.csv -> (frequency_hz, complex mismatch), sorted by frequency.

    Raises
    ------
    InputError
        The file is missing, has other columns, a value that is not a number, no
        rows, or a frequency or mismatch that cannot be used (<= 0 Hz, zero, NaN).
    """
    target = Path(path)
    if target.is_dir():
        target = target / CALIBRATION_FILE
    try:
        frame = pd.read_csv(target)
    except FileNotFoundError as exc:
        raise InputError("file not found", path=target) from exc
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise InputError(f"cannot read the calibration: {exc}", path=target) from exc
    if list(frame.columns) != list(CALIBRATION_COLUMNS):
        raise InputError("unexpected columns; expected " + ",".join(CALIBRATION_COLUMNS),
                         path=target, line=1)
    try:
        frame = frame.sort_values("frequency_hz")
        frequency_hz = frame["frequency_hz"].to_numpy(float)
        mismatch = (frame["mismatch_re"].to_numpy(float)
                    + 1j * frame["mismatch_im"].to_numpy(float))
    except (TypeError, ValueError) as exc:
        raise InputError(f"not a number in the calibration: {exc}", path=target) from exc
    # a zero or missing mismatch would divide every later point by zero
    if (frequency_hz.size == 0 or not np.all(np.isfinite(frequency_hz) & (frequency_hz > 0))
            or not np.all(np.isfinite(mismatch) & (mismatch != 0))):
        raise InputError("the calibration needs positive frequencies and finite, non-zero"
                         " mismatch values on every row", path=target)
    return frequency_hz, mismatch


def mismatch_at(frequency_hz: Any, calibration_frequency_hz: np.ndarray,
                calibration_mismatch: np.ndarray) -> Any:
    """The channel mismatch at any frequencies: gain in dB and unwrapped phase
    interpolated linearly in log f, held at the end values outside the calibration.

    Divide a measured ratio by this to take the channel mismatch out.

    Returns
    -------
    complex or numpy.ndarray
        A complex number for a scalar frequency, else a complex array of its shape.
    """
    f = np.atleast_1d(np.asarray(frequency_hz, dtype=float))
    cal_f = np.asarray(calibration_frequency_hz, dtype=float)
    cal_m = np.asarray(calibration_mismatch, dtype=complex)
    if cal_f.size == 0 or np.any(np.diff(cal_f) <= 0) or np.any(cal_f <= 0):
        raise InputError("calibration frequencies must be positive and increasing")
    log_f = np.log10(f)
    log_cal = np.log10(cal_f)
    gain_db = np.interp(log_f, log_cal, 20.0 * np.log10(np.abs(cal_m)))
    phase = np.interp(log_f, log_cal, np.unwrap(np.angle(cal_m)))
    result = 10.0 ** (gain_db / 20.0) * np.exp(1j * phase)
    if np.ndim(frequency_hz) == 0:
        return complex(result[0])
    return result.reshape(np.shape(frequency_hz))


@dataclass
class Run:
    """A run folder read back.

    Attributes
    ----------
    path
        The folder.
    manifest
        manifest.json as a dict.
    points
        points.csv as a DataFrame (columns as in the contract, ``flags`` a string).
    summary
        summary.json as a dict, or None if the run wrote none (yet).
    """

    path: Path
    manifest: dict[str, Any]
    points: pd.DataFrame
    summary: dict[str, Any] | None = None
    _calibration: tuple[np.ndarray, np.ndarray] | None = field(default=None, repr=False)

    @property
    def status(self) -> str | None:
        """``running``, ``complete``, ``aborted`` or ``failed``."""
        return self.manifest.get("status")

    @property
    def sign(self) -> int:
        """The procedure's loop sign (already applied to the stored gains)."""
        procedure = self.manifest.get("procedure") or {}
        return int(procedure.get("sign", 1)) if isinstance(procedure, dict) else 1

    @property
    def calibration(self) -> tuple[np.ndarray, np.ndarray] | None:
        """(frequency_hz, complex mismatch) from calibration.csv, or None."""
        if self._calibration is None and (self.path / CALIBRATION_FILE).exists():
            self._calibration = read_calibration(self.path / CALIBRATION_FILE)
        return self._calibration

    @property
    def steps(self) -> list[int]:
        """The sweep steps that stored points, in order."""
        return sorted(int(s) for s in self.points["step"].unique())

    def response_for(self, step: int | None = None):
        """The frequency response of one sweep step (default: the last one with points).

        Rows without a finite gain are left out. Returns a
        ``loopwright.analysis.FrequencyResponse`` (H with the sign applied and the
        channel mismatch divided out, as stored).

        Raises
        ------
        RunError
            No points, no such step, or a frequency stored twice in the step.
        """
        from loopwright.analysis import FrequencyResponse

        if self.points.empty:
            raise RunError(f"{self.path}: the run stored no points")
        chosen = self.steps[-1] if step is None else int(step)
        rows = self.points[self.points["step"] == chosen]
        if rows.empty:
            raise RunError(f"{self.path}: no points for step {chosen};"
                           f" steps with points: {self.steps}")
        rows = rows[np.isfinite(rows["gain_re"]) & np.isfinite(rows["gain_im"])]
        rows = rows.sort_values("frequency_hz", kind="stable")
        f = rows["frequency_hz"].to_numpy(float)
        if np.any(np.diff(f) <= 0):
            raise RunError(f"{self.path}: step {chosen} holds a frequency twice")
        h = rows["gain_re"].to_numpy(float) + 1j * rows["gain_im"].to_numpy(float)
        gain_std = rows["gain_db_std"].to_numpy(float)
        phase_std = rows["phase_deg_std"].to_numpy(float)
        return FrequencyResponse(
            f, h,
            gain_db_std=gain_std if np.all(np.isfinite(gain_std)) else None,
            phase_deg_std=phase_std if np.all(np.isfinite(phase_std)) else None,
            source=str(self.path / POINTS_FILE))

    @property
    def response(self):
        """The last sweep step's response as a ``FrequencyResponse``; see :meth:`response_for`."""
        return self.response_for(None)

    def to_frd(self, step: int | None = None):
        """The open loop ``L = -H`` as python-control's ``FrequencyResponseData``
        (omega in rad/s).

        python-control's margins assume negative feedback around ``L``; the stored ``H``
        is the round trip with the inversion included (``H = -L``), so
        ``control.stability_margins(run.to_frd())`` gives the margins of summary.json.

        Raises
        ------
        RunError
            python-control is not installed (``pip install 'loopwright[control]'``).
        """
        try:
            import control
        except ImportError as exc:
            raise RunError("to_frd() needs python-control: pip install 'loopwright[control]'"
                           ) from exc
        response = self.response_for(step)
        frequency_hz = np.asarray(response.frequency_hz, dtype=float)
        return control.FrequencyResponseData(-np.asarray(response.h, dtype=complex),
                                             2.0 * np.pi * frequency_hz)


def load_run(path: str | Path) -> Run:
    """Read a run folder.

    Parameters
    ----------
    path
        ``runs/<UTC time>_<procedure>_<serial>/``.

    Returns
    -------
    Run
        ``.manifest``, ``.points`` (DataFrame), ``.summary``, ``.response``,
        ``.calibration``, ``.to_frd()``.

    Raises
    ------
    InputError
        The folder is not a run of this format, or one of its files cannot be read.
    """
    folder = Path(path)
    manifest = read_manifest(folder)
    points = read_points(folder / POINTS_FILE)
    summary_path = folder / SUMMARY_FILE
    summary = _read_json(summary_path) if summary_path.exists() else None
    if summary is not None and not isinstance(summary, dict):
        raise InputError("summary.json must hold a JSON object", path=summary_path)
    return Run(path=folder, manifest=manifest, points=points, summary=summary)
