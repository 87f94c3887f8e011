"""Writing a run folder as the run goes, and picking it up again after a stop.

The format is the run-folder contract in DEVELOPERS.md. Durability rules:

- ``points.csv`` is appended one row per point; each row is written whole, flushed
  and ``os.fsync``-ed before :meth:`RunFolder.append_point` returns, so a point the
  runner was told is stored survives a kill or a power cut.
- ``manifest.json``, ``summary.json``, ``calibration.csv``, captures and
  ``closed_loop.npz`` are replaced atomically (temporary file, fsync, ``os.replace``),
  so a reader sees the old or the new file, never half of one.
- After a kill, :meth:`RunFolder.open_for_resume` drops a torn last row (one without
  its newline), truncates the file back to the last whole row and reports which
  points are done, so the runner measures none twice and loses none.
"""

from __future__ import annotations

import bisect
import contextlib
import csv
import io
import json
import math
import os
import platform
import tempfile
from collections.abc import Iterable, Mapping
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from loopwright.errors import InputError, RunError
from loopwright.store.names import run_folder_name, utc_iso

#: The manifest's format tag.
FORMAT = "loopwright-run/1"

#: points.csv columns, in order (the run-folder contract).
POINT_COLUMNS: tuple[str, ...] = (
    "index", "timestamp_utc", "step", "frequency_hz", "amplitude_vpp", "gain_db",
    "phase_deg", "gain_re", "gain_im", "gain_db_std", "phase_deg_std",
    "reference_amplitude_v", "response_amplitude_v", "reference_snr_db",
    "response_snr_db", "reference_thd_pct", "response_thd_pct",
    "reference_scale_v_per_div", "response_scale_v_per_div", "sample_rate_hz",
    "record_length", "averages", "refined", "flags",
)
#: calibration.csv columns, in order.
CALIBRATION_COLUMNS: tuple[str, ...] = (
    "frequency_hz", "mismatch_db", "mismatch_deg", "mismatch_re", "mismatch_im",
)
#: Quality flags a point may carry, in the order they are written.
FLAGS: tuple[str, ...] = ("clipped", "low_snr", "nonlinear", "unsettled")
#: Run states in the manifest.
STATUSES: tuple[str, ...] = ("running", "complete", "aborted", "failed")

POINTS_FILE = "points.csv"
MANIFEST_FILE = "manifest.json"
SUMMARY_FILE = "summary.json"
CALIBRATION_FILE = "calibration.csv"
CLOSED_LOOP_FILE = "closed_loop.npz"
TRAFFIC_FILE = "traffic.log"
CAPTURES_DIR = "captures"

_INT_COLUMNS = {"index", "step", "record_length", "averages", "refined"}
_MANIFEST_DEFAULTS: dict[str, Any] = {
    "operator": None, "station": None, "procedure": None, "procedure_file": None,
    "procedure_sha256": None, "bench": None, "instruments": {}, "ended_utc": None,
    "reason": None, "replay_of": None, "reanalysis_of": None, "calibration": None,
}


def _software_version() -> str:
    from loopwright import __version__

    return __version__


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, datetime):
        return utc_iso(value)
    raise TypeError(f"cannot store {type(value).__name__} in JSON")


def _fsync_dir(path: Path) -> None:
    # Makes a rename or a new file itself durable (POSIX); not possible on every OS.
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically: temporary file, fsync, ``os.replace``."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    _fsync_dir(path.parent)


def atomic_write_json(path: Path, data: Mapping[str, Any]) -> None:
    """Write JSON (numpy scalars allowed; NaN/inf refused) atomically."""
    try:
        text = json.dumps(data, indent=2, default=_json_default, allow_nan=False)
    except (TypeError, ValueError) as exc:
        raise RunError(f"cannot write {Path(path).name}: {exc}") from exc
    atomic_write_bytes(Path(path), (text + "\n").encode("utf-8"))


def _format_value(column: str, value: Any) -> str:
    if value is None:
        return ""
    if column == "flags":
        return _format_flags(value)
    if column == "timestamp_utc":
        return utc_iso(value) if isinstance(value, datetime) else str(value)
    if isinstance(value, bool | np.bool_):
        return "1" if value else "0"
    if column in _INT_COLUMNS:
        if isinstance(value, float | np.floating) and not float(value).is_integer():
            raise RunError(f"points.csv column {column} needs a whole number, got {value!r}")
        return str(int(value))
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        number = float(value)
        # repr() is the shortest text that reads back to the same float.
        return repr(number) if math.isfinite(number) else ("nan" if math.isnan(number)
                                                           else ("inf" if number > 0 else "-inf"))
    raise RunError(f"points.csv column {column} cannot hold {type(value).__name__}")


def _format_flags(value: Any) -> str:
    names = [v for v in value.split(";") if v] if isinstance(value, str) else list(value)
    unknown = [n for n in names if n not in FLAGS]
    if unknown:
        raise RunError(f"unknown point flag {unknown[0]!r}; flags are {', '.join(FLAGS)}")
    return ";".join(f for f in FLAGS if f in names)


def _row_text(row: Mapping[str, Any], index: int) -> str:
    unknown = [key for key in row if key not in POINT_COLUMNS]
    if unknown:
        raise RunError(f"points.csv has no column {unknown[0]!r}")
    values = dict(row)
    values.setdefault("index", index)
    values.setdefault("timestamp_utc", utc_iso())
    values.setdefault("refined", 0)
    buffer = io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerow(
        [_format_value(column, values.get(column)) for column in POINT_COLUMNS])
    return buffer.getvalue()


def _header_text() -> str:
    return ",".join(POINT_COLUMNS) + "\n"


class RunFolder:
    """One run's folder on disk, written while the run goes.

    Create one with :meth:`create` (a new run) or :meth:`open_for_resume` (an
    interrupted one). Use it as a context manager to close ``points.csv`` on exit;
    :meth:`finish` records the outcome.

    Attributes
    ----------
    path
        The run folder.
    manifest
        The manifest as last written.
    done_points
        Rows already in points.csv: dicts with ``index``, ``step``, ``frequency_hz``,
        ``gain_re``, ``gain_im``, ``refined`` and ``flags`` parsed (only these columns
        are kept in memory, so a 100,000-point run stays small); empty for a new run.
    """

    def __init__(self, path: Path, manifest: dict[str, Any],
                 done_points: list[dict[str, Any]] | None = None) -> None:
        self.path = Path(path)
        self.manifest = manifest
        self.done_points: list[dict[str, Any]] = [_compact(p) for p in done_points or []]
        # step -> sorted frequencies, for is_done without a scan of every point
        self._done_hz: dict[int, list[float]] = {}
        for point in self.done_points:
            bisect.insort(self._done_hz.setdefault(int(point["step"]), []),
                          float(point["frequency_hz"]))
        self._points_handle: io.BufferedWriter | None = None
        self._next_index = (max((int(p["index"]) for p in self.done_points), default=-1) + 1)

    # ------------------------------------------------------------------ creating

    @classmethod
    def create(cls, root: str | Path, procedure_name: str, serial: str,
               manifest: Mapping[str, Any], *, now: datetime | None = None) -> RunFolder:
        """Make ``root/<UTC time>_<procedure>_<serial>/`` and write its manifest.

        Parameters
        ----------
        root
            The folder that holds runs (made if missing).
        procedure_name, serial
            Sanitised into the folder name (never trusted as a path).
        manifest
            Fields of the contract the caller knows (procedure, bench, instruments,
            operator, station, procedure_file, procedure_sha256, replay_of, ...).
            ``format``, ``status`` (running), ``started_utc``, ``serial``, ``host`` and
            ``software_version`` are filled in unless given; missing optional fields are
            written as null.
        now
            The start time (default: now); a second run in the same second gets a
            ``-2``, ``-3`` ... suffix.

        Raises
        ------
        RunError
            The folder cannot be made.
        """
        root = Path(root)
        moment = now or datetime.now().astimezone()
        if root.exists() and not root.is_dir():
            raise InputError("the runs folder is a file, not a folder; give another --out",
                             path=root)
        try:
            root.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise RunError(f"cannot make the runs folder {root}: {exc.strerror}") from exc
        base = run_folder_name(procedure_name, serial, moment)
        path = root / base
        for attempt in range(2, 10_000):
            try:
                path.mkdir()
                break
            except FileExistsError:
                path = root / f"{base}-{attempt}"
            except OSError as exc:
                raise RunError(f"cannot make the run folder {path}: {exc.strerror}") from exc
        else:
            raise RunError(f"too many runs named {base} in {root}")
        record: dict[str, Any] = dict(_MANIFEST_DEFAULTS)
        record.update({
            "format": FORMAT,
            "software_version": _software_version(),
            "host": platform.node(),
            "serial": serial,
            "started_utc": utc_iso(moment),
            "status": "running",
        })
        record.update(manifest)
        record["format"] = FORMAT
        folder = cls(path, record)
        atomic_write_json(path / MANIFEST_FILE, record)
        _fsync_dir(root)
        return folder

    @classmethod
    def open_for_resume(cls, path: str | Path) -> RunFolder:
        """Open an interrupted run to continue it.

        Reads points.csv, drops a torn last row (no newline: the write was cut by a
        kill) and truncates the file back to the last whole row. The manifest is not
        changed here: the runner sets ``status`` back to running with
        :meth:`update_manifest` when it starts measuring.

        Returns
        -------
        RunFolder
            With :attr:`done_points`, :meth:`is_done` and :attr:`next_index` set.

        Raises
        ------
        InputError
            ``path`` is not a run folder (no readable manifest of this format).
        RunError
            The run is already complete, or points.csv is damaged other than at its end.
        """
        from loopwright.store.load import read_manifest

        path = Path(path)
        manifest = read_manifest(path)
        if manifest.get("status") == "complete":
            raise RunError(f"{path}: the run is already complete; nothing to resume")
        done = _repair_points(path / POINTS_FILE)
        return cls(path, manifest, done)

    # ------------------------------------------------------------------ state

    @property
    def next_index(self) -> int:
        """The ``index`` the next appended point gets."""
        return self._next_index

    @property
    def traffic_log_path(self) -> Path:
        """Where the SCPI traffic log goes (``traffic.log``)."""
        return self.path / TRAFFIC_FILE

    @property
    def captures_dir(self) -> Path:
        """Where raw captures go (``captures/``; made on the first capture)."""
        return self.path / CAPTURES_DIR

    def is_done(self, step: int, frequency_hz: float) -> bool:
        """True if points.csv already holds a point of ``step`` at ``frequency_hz``.

        Frequencies are written with Python's shortest round-trip text, so a planned
        frequency reads back bit for bit; a relative tolerance of 1e-9 covers the rest.
        """
        done = self._done_hz.get(int(step), [])
        at = bisect.bisect_left(done, float(frequency_hz))
        return any(math.isclose(done[i], float(frequency_hz), rel_tol=1e-9)
                   for i in (at - 1, at) if 0 <= i < len(done))

    def done_in_step(self, step: int) -> list[dict[str, Any]]:
        """The stored points of one step, in the order they were measured."""
        return [p for p in self.done_points if int(p["step"]) == int(step)]

    # ------------------------------------------------------------------ writing

    def append_point(self, row: Mapping[str, Any]) -> int:
        """Append one point to points.csv; flushed and fsynced before returning.

        Parameters
        ----------
        row
            Column -> value for any of :data:`POINT_COLUMNS`. ``index`` defaults to
            :attr:`next_index`, ``timestamp_utc`` to now, ``refined`` to 0; missing
            columns are left empty. ``flags`` is a ';'-joined string or a list of
            :data:`FLAGS`; booleans become 0/1; floats are written to round-trip.

        Returns
        -------
        int
            The point's ``index``.

        Raises
        ------
        RunError
            An unknown column or flag, or the write failed.
        """
        index = int(row.get("index", self._next_index))
        text = _row_text(row, index)
        handle = self._points()
        try:
            handle.write(text.encode("utf-8"))
            handle.flush()
            os.fsync(handle.fileno())
        except OSError as exc:
            raise RunError(f"cannot write {self.path / POINTS_FILE}: {exc.strerror}") from exc
        parsed = _compact(_parse_row(next(csv.reader([text])), self.path / POINTS_FILE, 0))
        self.done_points.append(parsed)
        bisect.insort(self._done_hz.setdefault(int(parsed["step"]), []),
                      float(parsed["frequency_hz"]))
        self._next_index = max(self._next_index, index + 1)
        return index

    def _points(self) -> io.BufferedWriter:
        if self._points_handle is None:
            target = self.path / POINTS_FILE
            fresh = not target.exists() or target.stat().st_size == 0
            try:
                handle = open(target, "ab")  # noqa: SIM115 (kept open for the run)
                if fresh:
                    handle.write(_header_text().encode("ascii"))
                    handle.flush()
                    os.fsync(handle.fileno())
                    _fsync_dir(self.path)
            except OSError as exc:
                raise RunError(f"cannot open {target}: {exc.strerror}") from exc
            self._points_handle = handle
        return self._points_handle

    def save_capture(self, index: int, reference_v: np.ndarray, response_v: np.ndarray,
                     sample_rate_hz: float, frequency_hz: float,
                     amplitude_vpp: float) -> Path:
        """Store one point's raw two-channel record as ``captures/point_NNNNN.npz``."""
        self.captures_dir.mkdir(exist_ok=True)
        target = self.captures_dir / f"point_{int(index):05d}.npz"
        buffer = io.BytesIO()
        np.savez(buffer, reference_v=np.asarray(reference_v, dtype=float),
                 response_v=np.asarray(response_v, dtype=float),
                 sample_rate_hz=float(sample_rate_hz), frequency_hz=float(frequency_hz),
                 amplitude_vpp=float(amplitude_vpp))
        atomic_write_bytes(target, buffer.getvalue())
        return target

    def write_calibration(self, frequency_hz: Iterable[float],
                          mismatch: Iterable[complex]) -> Path:
        """Store the channel mismatch (channel 2 / channel 1, one node) as calibration.csv.

        Also sets ``"calibration": "calibration.csv"`` in the manifest.
        """
        f = np.asarray(list(frequency_hz), dtype=float)
        m = np.asarray(list(mismatch), dtype=complex)
        if f.shape != m.shape or f.ndim != 1 or f.size == 0:
            raise RunError("calibration needs equally long, non-empty frequency and"
                           " mismatch arrays")
        buffer = io.StringIO()
        writer = csv.writer(buffer, lineterminator="\n")
        writer.writerow(CALIBRATION_COLUMNS)
        with np.errstate(divide="ignore"):
            mismatch_db = 20.0 * np.log10(np.abs(m))
        for row in zip(f, mismatch_db, np.degrees(np.angle(m)), m.real, m.imag, strict=True):
            writer.writerow([_format_value("x", float(v)) for v in row])
        target = self.path / CALIBRATION_FILE
        atomic_write_bytes(target, buffer.getvalue().encode("utf-8"))
        self.update_manifest(calibration=CALIBRATION_FILE)
        return target

    def write_closed_loop(self, time_s: np.ndarray, response_v: np.ndarray) -> Path:
        """Store a few cycles of the free-running waveform as closed_loop.npz."""
        buffer = io.BytesIO()
        np.savez(buffer, time_s=np.asarray(time_s, dtype=float),
                 response_v=np.asarray(response_v, dtype=float))
        target = self.path / CLOSED_LOOP_FILE
        atomic_write_bytes(target, buffer.getvalue())
        return target

    def update_manifest(self, **fields: Any) -> None:
        """Change manifest fields and rewrite manifest.json atomically."""
        if "status" in fields and fields["status"] not in STATUSES:
            raise RunError(f"unknown run status {fields['status']!r};"
                           f" one of {', '.join(STATUSES)}")
        updated = dict(self.manifest)
        updated.update(fields)
        updated["format"] = FORMAT
        atomic_write_json(self.path / MANIFEST_FILE, updated)
        self.manifest = updated

    def write_summary(self, summary: Mapping[str, Any]) -> None:
        """Write summary.json atomically (NaN is refused: use null for "no value")."""
        atomic_write_json(self.path / SUMMARY_FILE, summary)

    def finish(self, status: str, reason: str | None = None) -> None:
        """Record the outcome (complete, aborted or failed) and the end time; close files."""
        if status not in STATUSES or status == "running":
            raise RunError(f"a run finishes as complete, aborted or failed, not {status!r}")
        self.close()
        self.update_manifest(status=status, reason=reason, ended_utc=utc_iso())

    def close(self) -> None:
        """Close points.csv (the manifest is left as it is)."""
        if self._points_handle is not None:
            self._points_handle.close()
            self._points_handle = None

    def __enter__(self) -> RunFolder:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


# ---------------------------------------------------------------------- reading rows


_KEPT_COLUMNS = ("index", "step", "frequency_hz", "gain_re", "gain_im", "refined", "flags")


def _compact(row: Mapping[str, Any]) -> dict[str, Any]:
    """The columns a run needs to resume (the rest stays on disk)."""
    return {key: row.get(key) for key in _KEPT_COLUMNS}


def _parse_row(fields: list[str], path: Path, line: int) -> dict[str, Any]:
    if len(fields) != len(POINT_COLUMNS):
        raise RunError(f"{path}:{line}: expected {len(POINT_COLUMNS)} columns,"
                       f" found {len(fields)}; the file is damaged")
    row: dict[str, Any] = {}
    for column, text in zip(POINT_COLUMNS, fields, strict=True):
        if column in ("timestamp_utc", "flags"):
            row[column] = text
        elif text == "":
            row[column] = None
        else:
            try:
                row[column] = int(text) if column in _INT_COLUMNS else float(text)
            except ValueError as exc:
                raise RunError(f"{path}:{line}: {column}: not a number ({text!r})") from exc
    if row["index"] is None or row["step"] is None or row["frequency_hz"] is None:
        raise RunError(f"{path}:{line}: index, step and frequency_hz must not be empty")
    return row


def _repair_points(path: Path) -> list[dict[str, Any]]:
    """Read points.csv, cut a torn last row off the file, return the whole rows."""
    if not path.exists():
        return []
    raw = path.read_bytes()
    end = raw.rfind(b"\n") + 1
    if end < len(raw):
        # The last write was cut by a kill: that point was never confirmed stored.
        with open(path, "r+b") as handle:
            handle.truncate(end)
            handle.flush()
            os.fsync(handle.fileno())
        raw = raw[:end]
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise RunError(f"{path}:{line}: not UTF-8 text; the file is damaged") from exc
    lines = text.splitlines()
    if not lines:
        return []
    if lines[0] != ",".join(POINT_COLUMNS):
        raise InputError("the header is not loopwright's points.csv header",
                         path=path, line=1)
    rows = []
    for number, fields in enumerate(csv.reader(lines[1:]), start=2):
        rows.append(_parse_row(fields, path, number))
    return rows
