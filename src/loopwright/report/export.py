"""A run taken into other tools: a spreadsheet (CSV) or a script (JSON).

(For python-control, ``loopwright.store.load_run(path).to_frd()`` gives the open loop as
a ``FrequencyResponseData``.)

CSV: plain commas, one header row, dot decimals, no index column, numbers written
with full precision (they read back bit for bit); units in every column name; flags
joined by spaces so no spreadsheet mistakes them for a delimiter.

JSON: ``{"format": "loopwright-export/1", "run", "manifest", "summary", "points",
"calibration"}`` with the same column names; NaN becomes null.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from loopwright.errors import InputError
from loopwright.report.source import ReportInput, report_input

EXPORT_FORMAT = "loopwright-export/1"
FORMATS = ("csv", "json")

#: points.csv column -> export column: the run's names, a unit added where one is missing.
POINT_COLUMNS: dict[str, str] = {
    "index": "index",
    "timestamp_utc": "timestamp_utc",
    "step": "step",
    "frequency_hz": "frequency_hz",
    "gain_db": "gain_db",
    "phase_deg": "phase_deg",
    "gain_re": "gain_re_v_per_v",
    "gain_im": "gain_im_v_per_v",
    "gain_db_std": "gain_db_std",
    "phase_deg_std": "phase_deg_std",
    "amplitude_vpp": "amplitude_vpp",
    "reference_amplitude_v": "reference_amplitude_v",
    "response_amplitude_v": "response_amplitude_v",
    "reference_snr_db": "reference_snr_db",
    "response_snr_db": "response_snr_db",
    "reference_thd_pct": "reference_thd_pct",
    "response_thd_pct": "response_thd_pct",
    "reference_scale_v_per_div": "reference_scale_v_per_div",
    "response_scale_v_per_div": "response_scale_v_per_div",
    "sample_rate_hz": "sample_rate_hz",
    "record_length": "record_length_samples",
    "averages": "averages_count",
    "refined": "refined",
    "flags": "flags",
}


def points_table(points: pd.DataFrame) -> pd.DataFrame:
    """The export columns of ``points`` (sorted by frequency, renamed with units)."""
    present = [c for c in POINT_COLUMNS if c in points.columns]
    table = points[present].sort_values("frequency_hz", kind="stable").reset_index(drop=True)
    table = table.rename(columns=POINT_COLUMNS)
    if "flags" in table.columns:
        table["flags"] = table["flags"].map(
            lambda v: " ".join(p for p in str(v).split(";") if p) if isinstance(v, str) else "")
    return table


def _clean(value: Any) -> Any:
    """JSON-safe copy: NaN/inf -> None, numpy scalars -> Python numbers."""
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def export_json(data: ReportInput) -> str:
    """The JSON export of one run."""
    document = {
        "format": EXPORT_FORMAT,
        "run": data.path.name,
        "manifest": data.manifest,
        "summary": data.summary,
        "points": points_table(data.points).to_dict(orient="records"),
        "calibration": (None if data.calibration is None
                        else data.calibration.to_dict(orient="records")),
    }
    return json.dumps(_clean(document), indent=2, allow_nan=False) + "\n"


def export_csv(data: ReportInput) -> str:
    """The CSV export of one run's points (full float precision)."""
    return points_table(data.points).to_csv(index=False, lineterminator="\n")


def export_text(run_dir: str | Path, fmt: str) -> str:
    """The export of ``run_dir`` in ``fmt`` (``csv`` or ``json``) as text."""
    if fmt not in FORMATS:
        raise InputError(f"unknown format {fmt!r}; choose one of {', '.join(FORMATS)}",
                         field="format")
    data = report_input(run_dir)
    return export_csv(data) if fmt == "csv" else export_json(data)


def export_run(run_dir: str | Path, fmt: str, out: str | Path) -> Path:
    """Write the export of ``run_dir`` in ``fmt`` (``csv`` or ``json``) to ``out``.

    Parameters
    ----------
    run_dir
        The run folder.
    fmt
        ``csv`` (points, for a spreadsheet) or ``json`` (everything, for a script).
    out
        Output file.

    Returns
    -------
    Path
        The file written.
    """
    text = export_text(run_dir, fmt)
    target = Path(out)
    try:
        target.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write the export: {exc.strerror}", path=target) from exc
    return target
