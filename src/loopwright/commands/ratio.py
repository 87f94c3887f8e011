"""``loopwright ratio CAPTURE --frequency HZ``: one gain/phase point from a saved capture.

CAPTURE is a two-channel record saved from any scope:

- CSV with the header ``time_s,reference_v,response_v``, or the same three columns
  without a header; lines starting with ``#`` are comments;
- ``.npz`` with ``time_s``, ``reference_v``, ``response_v``, or with ``reference_v``,
  ``response_v`` and a scalar ``sample_rate_hz``.

The sample rate comes from the time column, which must rise in equal steps.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import sys
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from loopwright.dsp import ESTIMATORS, WINDOWS, PointEstimate, estimate_point
from loopwright.errors import EstimationError, InputError

__all__ = ["TwoChannelRecord", "load_capture", "register"]

COLUMNS = ("time_s", "reference_v", "response_v")
# a step may differ from the median step by this fraction (time stamps printed with
# few digits); a dropped or repeated sample is far outside it
STEP_TOLERANCE = 0.25


@dataclass(frozen=True)
class TwoChannelRecord:
    """Reference and response samples at a uniform sample rate."""

    reference_v: NDArray[np.float64]
    response_v: NDArray[np.float64]
    sample_rate_hz: float


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``ratio`` command."""
    parser = subparsers.add_parser(
        "ratio",
        help="gain and phase of response/reference from a saved two-channel capture",
        description=(
            "Estimate the complex ratio H = response / reference at one frequency from "
            "a two-channel capture (CSV time_s,reference_v,response_v or .npz)."
        ),
    )
    parser.add_argument("capture", type=Path, metavar="CAPTURE", help="CSV or .npz capture")
    parser.add_argument(
        "--frequency", type=float, required=True, metavar="HZ", help="stimulus frequency in Hz"
    )
    parser.add_argument(
        "--estimator",
        default="sinefit",
        choices=sorted(ESTIMATORS),
        help="how to estimate the point (default: sinefit)",
    )
    parser.add_argument(
        "--window",
        choices=list(WINDOWS),
        default=None,
        help="window of the dft and xcorr estimators (default: hann)",
    )
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Load the capture, estimate the point, print it."""
    options = {}
    if args.window is not None:
        if args.estimator == "sinefit":
            raise InputError("--window applies to the dft and xcorr estimators, not sinefit")
        options["window"] = args.window
    record = load_capture(args.capture)
    try:
        point = estimate_point(
            record.reference_v,
            record.response_v,
            record.sample_rate_hz,
            args.frequency,
            method=args.estimator,
            **options,
        )
    except EstimationError as exc:
        raise EstimationError(f"{args.capture}: {exc}") from exc
    if args.json:
        json.dump(point.to_dict(), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        _print_table(point, args.capture, record)
    return 0


def load_capture(path: str | Path) -> TwoChannelRecord:
    """Read a two-channel capture (CSV or .npz).

    Raises
    ------
    InputError
        Missing, empty or unreadable file, wrong columns or keys, a non-numeric or
        non-finite value, a time column that does not rise in equal steps; the message
        names the file, the line (CSV) and the field.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError("no such capture file", path=path)
    if path.stat().st_size == 0:
        raise InputError("the capture file is empty", path=path)
    if path.suffix.lower() == ".npz":
        return _load_npz(path)
    return _load_csv(path)


def _load_csv(path: Path) -> TwoChannelRecord:
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read the capture as text: {exc}", path=path) from exc
    # lines starting with '#' are comments (a note on where the capture came from)
    lines = ["" if line.lstrip().startswith("#") else line for line in text.splitlines()]
    first = next((i for i, line in enumerate(lines) if line.strip()), None)
    if first is None:
        raise InputError("the capture file has no data", path=path)
    header_cells = [c.strip() for c in next(csv.reader([lines[first]]))]
    if _all_numbers(header_cells):
        data_start = first
    else:
        if [c.lower() for c in header_cells] != list(COLUMNS):
            raise InputError(
                f"header is {','.join(header_cells)!r}; expected {','.join(COLUMNS)!r} "
                "(or three numeric columns without a header)",
                path=path,
                line=first + 1,
            )
        data_start = first + 1
    values = np.empty((len(lines) - data_start, 3))
    line_nos: list[int] = []
    count = 0
    # one pass with a line number for every value; csv handles quoting
    for offset, row in enumerate(csv.reader(lines[data_start:])):
        line_no = data_start + offset + 1
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) != 3:
            raise InputError(
                f"expected 3 columns ({','.join(COLUMNS)}), found {len(row)}",
                path=path,
                line=line_no,
            )
        for col, cell in enumerate(row):
            try:
                value = float(cell)
            except ValueError:
                raise InputError(
                    f"{cell.strip()!r} is not a number", path=path, line=line_no, field=COLUMNS[col]
                ) from None
            if not math.isfinite(value):
                raise InputError(
                    f"{cell.strip()!r} is not a finite number",
                    path=path,
                    line=line_no,
                    field=COLUMNS[col],
                )
            values[count, col] = value
        line_nos.append(line_no)
        count += 1
    if count == 0:
        raise InputError("the capture has a header but no samples", path=path)
    values = values[:count]
    fs = _sample_rate(values[:, 0], path, line_nos.__getitem__, "time_s")
    return TwoChannelRecord(values[:, 1].copy(), values[:, 2].copy(), fs)


def _load_npz(path: Path) -> TwoChannelRecord:
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {k: np.asarray(data[k]) for k in data.files}
    except (OSError, ValueError, zipfile.BadZipFile, EOFError) as exc:
        raise InputError(f"not a readable .npz file: {exc}", path=path) from exc
    for key in ("reference_v", "response_v"):
        if key not in arrays:
            raise InputError(
                f"missing array {key!r}; the file has {sorted(arrays)}; expected "
                "time_s, reference_v, response_v (or sample_rate_hz instead of time_s)",
                path=path,
                field=key,
            )
    channels = {}
    for key in ("reference_v", "response_v"):
        channels[key] = _numeric_1d(arrays[key], path, key)
    n = channels["reference_v"].size
    if channels["response_v"].size != n:
        raise InputError(
            f"reference_v has {n} samples, response_v {channels['response_v'].size}",
            path=path,
            field="response_v",
        )
    if "time_s" in arrays:
        t = _numeric_1d(arrays["time_s"], path, "time_s")
        if t.size != n:
            raise InputError(
                f"time_s has {t.size} samples, the channels {n}", path=path, field="time_s"
            )
        fs = _sample_rate(t, path, None, "time_s")
    elif "sample_rate_hz" in arrays:
        rate = arrays["sample_rate_hz"]
        if rate.size != 1 or not np.issubdtype(rate.dtype, np.number):
            raise InputError("must be one number", path=path, field="sample_rate_hz")
        fs = float(rate.reshape(()))
        if not (math.isfinite(fs) and fs > 0):
            raise InputError(f"must be positive, got {fs!r}", path=path, field="sample_rate_hz")
    else:
        raise InputError(
            "needs either time_s or sample_rate_hz to know the sample rate",
            path=path,
            field="time_s",
        )
    return TwoChannelRecord(channels["reference_v"], channels["response_v"], fs)


def _numeric_1d(arr: np.ndarray, path: Path, key: str) -> NDArray[np.float64]:
    if arr.ndim != 1 or arr.size == 0:
        raise InputError(
            f"must be a non-empty 1-D array, got shape {arr.shape}", path=path, field=key
        )
    if not (np.issubdtype(arr.dtype, np.number) and not np.iscomplexobj(arr)):
        raise InputError(f"must be real numbers, got dtype {arr.dtype}", path=path, field=key)
    out = arr.astype(np.float64)
    bad = ~np.isfinite(out)
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"sample {i} is {float(out[i])!r}", path=path, field=f"{key}[{i}]")
    return out


def _sample_rate(t: NDArray, path: Path, line_of, field: str) -> float:
    """Sample rate from a time column; the steps must be positive and equal."""
    if t.size < 2:
        raise InputError("needs at least two samples to know the sample rate", path=path)
    dt = np.diff(t)

    def where(i: int) -> dict:
        # step i goes from row i to row i + 1: blame row i + 1
        if line_of is None:
            return {"field": f"{field}[{i + 1}]"}
        return {"line": line_of(i + 1), "field": field}

    bad = dt <= 0
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(
            f"time does not increase ({float(t[i])!r} then {float(t[i + 1])!r}): samples must"
            " be in time order",
            path=path,
            **where(i),
        )
    step = float(np.median(dt))
    off = np.abs(dt - step) > STEP_TOLERANCE * step
    if off.any():
        i = int(np.argmax(off))
        raise InputError(
            f"uneven time step {dt[i]:.6g} s where the rest are {step:.6g} s: the capture "
            "must be uniformly sampled (a dropped or repeated sample?)",
            path=path,
            **where(i),
        )
    return (t.size - 1) / float(t[-1] - t[0])


def _all_numbers(cells: list[str]) -> bool:
    try:
        [float(c) for c in cells]
    except ValueError:
        return False
    return True


def _print_table(point: PointEstimate, path: Path, record: TwoChannelRecord) -> None:
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    console = Console()
    n = record.reference_v.size
    console.print(
        f"[bold]{escape(str(path))}[/bold]: {n} samples at {record.sample_rate_hz:.6g} Hz, "
        f"estimator {point.method}"
    )
    summary = Table(show_header=True, header_style="bold")
    summary.add_column("quantity")
    summary.add_column("value", justify="right")
    summary.add_column("std (1 sigma)", justify="right")
    summary.add_row("frequency", f"{point.frequency_hz:.9g} Hz", "")
    summary.add_row("gain", f"{point.gain_db:.4f} dB", f"{point.gain_db_std:.2g} dB")
    summary.add_row("phase", f"{point.phase_deg:.4f} deg", f"{point.phase_deg_std:.2g} deg")
    summary.add_row("H (re, im)", f"{point.gain.real:.6g}, {point.gain.imag:.6g}", "")
    console.print(summary)
    channels = Table(show_header=True, header_style="bold")
    channels.add_column("channel")
    channels.add_column("reference", justify="right")
    channels.add_column("response", justify="right")
    ref, resp = point.reference, point.response
    rows = (
        ("amplitude", "{:.6g} V", "amplitude_v"),
        ("phase", "{:.3f} deg", "phase_deg"),
        ("offset", "{:.4g} V", "offset_v"),
        ("SNR", "{:.1f} dB", "snr_db"),
        ("THD", "{:.3g} %", "thd_pct"),
        ("noise rms", "{:.3g} V", "noise_rms_v"),
    )
    for label, fmt, attr in rows:
        channels.add_row(label, fmt.format(getattr(ref, attr)), fmt.format(getattr(resp, attr)))
    console.print(channels)
