"""The bundled procedures run on their simulated benches, and ``loopwright demo`` works.

Each pair (procedure, bench) in procedures/ is an invented scenario; the verdicts here
are the ones those scenarios were designed to give.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.resources import data_dir

PAIRS = [
    ("regulator-injection.yaml", "bench-regulator-sim.yaml", "pass"),
    ("opamp-stage.yaml", "bench-opamp-sim.yaml", "pass"),
    ("production-quick.yaml", "bench-opamp-sim.yaml", "pass"),
]


@pytest.mark.parametrize(("procedure", "bench", "verdict"), PAIRS,
                         ids=[p[0] for p in PAIRS])
def test_bundled_procedure_runs_on_its_bench(tmp_path, procedure, bench, verdict):
    folder = data_dir("procedures")
    outcome = run_procedure(folder / procedure, folder / bench,
                            RunOptions(out_dir=tmp_path, quiet=True, render_report=False))
    assert outcome.status == "complete"
    assert outcome.output_off
    assert outcome.summary["verdict"] == verdict


def test_demo_command_end_to_end(tmp_path):
    """The README's main command: the oscillator demo through pyvisa-py over TCP."""
    result = subprocess.run(
        [sys.executable, "-m", "loopwright", "demo", "--out", str(tmp_path)],
        capture_output=True, text=True, timeout=600, stdin=subprocess.DEVNULL)
    assert result.returncode == 0, result.stderr
    assert "predicted oscillation frequency" in result.stdout
    run_dir = next(tmp_path.iterdir())
    summary = json.loads((run_dir / "summary.json").read_text())
    assert summary["verdict"] == "pass"
    closed = summary["closed_loop"]
    # practice (references.md): the closed loop runs within a few % of the 0 deg point
    assert abs(closed["frequency_error_pct"]) < 2.0
    assert (run_dir / "report.html").exists() and (run_dir / "bode.png").exists()
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert manifest["status"] == "complete" and manifest["output_off_confirmed"]
