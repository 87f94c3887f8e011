"""Test scaffolding for the production tests: a small runner over an analytic loop.

The batch loop takes the runner as a callable. These tests give it
:class:`AnalyticBoardRunner`, which writes a real run folder (run-folder contract:
manifest.json, points.csv, summary.json) for an invented three-pole amplifier loop
whose DC loop gain depends on the board (component spread), so phase margin,
gain margin and crossover differ from board to board and some boards fail.

The loop is L(s) = K / ((1 + s/w1)(1 + s/w2)(1 + s/w3)) with poles at 1 kHz, 60 kHz
and 300 kHz (invented). The measured H is -L (DEVELOPERS.md convention). Figures
come from a dense numeric grid; the test below checks them against python-control's
``stability_margins``.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from loopwright.store.names import safe_part
from loopwright.store.writer import POINT_COLUMNS

POLES_HZ = (1e3, 60e3, 300e3)
LIMITS = (
    # name, figure, min, max, unit
    ("phase margin", "phase_margin_deg", 45.0, None, "deg"),
    ("gain margin", "gain_margin_db", 10.0, None, "dB"),
    ("crossover", "crossover_hz", 10e3, 40e3, "Hz"),
)


def open_loop(frequency_hz: np.ndarray, dc_gain: float) -> np.ndarray:
    """L(j 2 pi f) of the invented three-pole loop."""
    s = 2j * np.pi * np.asarray(frequency_hz, dtype=float)
    den = np.ones_like(s)
    for pole_hz in POLES_HZ:
        den = den * (1 + s / (2 * np.pi * pole_hz))
    return dc_gain / den


def loop_figures(dc_gain: float) -> dict[str, float]:
    """Phase margin, gain margin and crossover from a dense log grid (interpolated)."""
    f = np.logspace(1, 7, 20001)
    lg = open_loop(f, dc_gain)
    mag_db = 20 * np.log10(np.abs(lg))
    phase = np.unwrap(np.angle(lg)) * 180 / np.pi  # 0 at DC, falls to -270
    k = int(np.flatnonzero(mag_db < 0)[0])
    t = mag_db[k - 1] / (mag_db[k - 1] - mag_db[k])
    crossover_hz = float(10 ** (np.log10(f[k - 1]) + t * np.log10(f[k] / f[k - 1])))
    phase_at_crossover = phase[k - 1] + t * (phase[k] - phase[k - 1])
    j = int(np.flatnonzero(phase < -180)[0])
    u = (phase[j - 1] + 180) / (phase[j - 1] - phase[j])
    mag_at_180 = mag_db[j - 1] + u * (mag_db[j] - mag_db[j - 1])
    return {
        "phase_margin_deg": float(180 + phase_at_crossover),
        "gain_margin_db": float(-mag_at_180),
        "crossover_hz": crossover_hz,
    }


def dc_gain_of(serial: str) -> float:
    """An invented, repeatable spread of DC loop gain: 18 to 30 from the serial's hash."""
    digest = hashlib.sha256(serial.encode("utf-8")).digest()
    return 18.0 + 12.0 * digest[0] / 255.0


@dataclass
class AnalyticBoardRunner:
    """``run_one(serial, *, retest, out_dir) -> (run_dir, summary)`` over the analytic loop.

    ``gains`` fixes the DC gain of chosen serials; others get :func:`dc_gain_of`.
    Start times are ``first_start_utc`` plus one hour per board, so ``--since`` can
    be tested. Every call is logged in ``calls``.
    """

    procedure_file: Path
    station: str = "station-a"
    operator: str = "tester"
    gains: dict[str, float] = field(default_factory=dict)
    first_start_utc: datetime = datetime(2026, 3, 1, 8, 0, tzinfo=timezone.utc)
    calls: list[tuple[str, bool]] = field(default_factory=list)

    def __call__(self, serial: str, *, retest: bool, out_dir: Path) -> tuple[Path, dict]:
        self.calls.append((serial, retest))
        started = self.first_start_utc + timedelta(hours=len(self.calls) - 1)
        ended = started + timedelta(seconds=42)
        part = safe_part(serial)  # the run folder's own rule, as the runner uses it
        name = f"{started.strftime('%Y%m%dT%H%M%SZ')}_scaffold-loop_{part}"
        run_dir = Path(out_dir) / name
        run_dir.mkdir(parents=True, exist_ok=False)
        gain = self.gains.get(serial, dc_gain_of(serial))
        self._write_points(run_dir / "points.csv", gain, started)
        figures = loop_figures(gain)
        limits = []
        for limit_name, figure, low, high, unit in LIMITS:
            value = figures[figure]
            margins = [m for m in (
                None if low is None else value - low, None if high is None else high - value
            ) if m is not None]
            margin = min(margins)
            limits.append({
                "name": limit_name, "figure": figure, "min": low, "max": high,
                "unit": unit, "value": value, "passed": margin >= 0, "margin": margin,
            })
        summary: dict[str, Any] = {
            "analysis": dict(figures),
            "limits": limits,
            "verdict": "pass" if all(lim["passed"] for lim in limits) else "fail",
            "closed_loop": None,
            "points": 41,
            "flagged_points": 0,
        }
        (run_dir / "summary.json").write_text(json.dumps(summary, indent=2))
        manifest = {
            "format": "loopwright-run/1", "software_version": "test", "host": "testhost",
            "operator": self.operator, "serial": serial, "station": self.station,
            "procedure": {"name": "scaffold-loop"},
            "procedure_file": str(self.procedure_file),
            "procedure_sha256": hashlib.sha256(self.procedure_file.read_bytes()).hexdigest(),
            "bench": {}, "instruments": {},
            "started_utc": started.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
            "ended_utc": ended.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
            "status": "complete", "reason": None, "replay_of": None,
            "reanalysis_of": None, "calibration": None, "retest": retest,
        }
        (run_dir / "manifest.json").write_text(json.dumps(manifest, indent=2))
        (run_dir / "traffic.log").write_text("")
        return run_dir, summary

    @staticmethod
    def _write_points(path: Path, gain: float, started: datetime) -> None:
        f = np.logspace(3, 6, 41)
        h = -open_loop(f, gain)
        lines = [",".join(POINT_COLUMNS)]
        for i, (fi, hi) in enumerate(zip(f, h, strict=True)):
            row = {c: "" for c in POINT_COLUMNS}
            row.update(
                index=i, timestamp_utc=started.isoformat(), step=0, frequency_hz=fi,
                amplitude_vpp=0.1, gain_db=20 * np.log10(abs(hi)),
                phase_deg=float(np.angle(hi, deg=True)), gain_re=hi.real, gain_im=hi.imag,
                refined=0, flags="",
            )
            lines.append(",".join(str(row[c]) for c in POINT_COLUMNS))
        path.write_text("\n".join(lines) + "\n")


@pytest.mark.parametrize("dc_gain", [18.0, 24.0, 30.0, 45.0])
def test_scaffold_figures_match_python_control(dc_gain: float) -> None:
    """The scaffold's margins agree with python-control's stability_margins."""
    import control  # test dependency: missing fails, never skips
    w = [2 * np.pi * p for p in POLES_HZ]
    sys = control.tf([dc_gain], [1.0])
    for wp in w:
        sys = sys * control.tf([1.0], [1 / wp, 1.0])
    gm, pm, _sm, wpc, wgc, _wms = control.stability_margins(sys)
    ours = loop_figures(dc_gain)
    assert ours["phase_margin_deg"] == pytest.approx(pm, abs=0.01)
    assert ours["gain_margin_db"] == pytest.approx(20 * np.log10(gm), abs=0.01)
    assert ours["crossover_hz"] == pytest.approx(wgc / (2 * np.pi), rel=1e-4)
    assert wpc > wgc  # stable: phase crossover above gain crossover


def batch_worker(job: tuple[str, str, str, str, str, int, float]) -> int:
    """One station's batch in its own process: ``count`` boards into a shared index.

    ``job`` = (procedure file, bench file, out folder, index URL or path, station,
    count, start time as ``time.time()``: every worker waits for it, so the stations
    really write at once). Used by
    the concurrency tests (SQLite file and PostgreSQL); returns boards run.
    """
    import io
    import time

    from rich.console import Console

    from loopwright.production.batch import run_batch

    procedure, bench, out_dir, index_url, station, count, start_at = job
    time.sleep(max(0.0, start_at - time.time()))
    runner = AnalyticBoardRunner(Path(procedure), station=station)
    serials = "".join(f"{station}-SN{i:04d}\n" for i in range(count)) + "\n"
    summary = run_batch(
        procedure, bench, station=station, operator="op", out_dir=out_dir,
        index_url=index_url, input_stream=io.StringIO(serials),
        console=Console(file=io.StringIO(), width=100), run_one=runner,
    )
    assert summary.errors == 0, [b.message for b in summary.boards if b.message]
    return len(summary.boards)
