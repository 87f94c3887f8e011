"""loopwright.store: the run folder (see the run-folder contract in DEVELOPERS.md).

Write with :class:`RunFolder` (``create``, ``open_for_resume``, ``append_point``,
``save_capture``, ``write_calibration``, ``write_closed_loop``, ``update_manifest``,
``write_summary``, ``finish``); read with :func:`load_run`.
"""

from loopwright.store.load import (
    Run,
    load_run,
    mismatch_at,
    read_calibration,
    read_manifest,
    read_points,
)
from loopwright.store.names import run_folder_name, safe_part
from loopwright.store.writer import (
    CALIBRATION_COLUMNS,
    FLAGS,
    FORMAT,
    POINT_COLUMNS,
    STATUSES,
    RunFolder,
)

__all__ = [
    "CALIBRATION_COLUMNS",
    "FLAGS",
    "FORMAT",
    "POINT_COLUMNS",
    "STATUSES",
    "Run",
    "RunFolder",
    "load_run",
    "mismatch_at",
    "read_calibration",
    "read_manifest",
    "read_points",
    "run_folder_name",
    "safe_part",
]
