"""The batch loop with the real runner on the simulated bench.

Five invented boards of an op-amp buffer driving a capacitive load (the simulated
bench's ``opamp_capload`` model), each with its own load capacitance (component
spread), one of them so heavy that the phase margin fails. Each board's figures are
checked against the model's exact response analysed by the same analysis code
(python-control and scipy check that exact response in the DUT tests), and the index
and the statistics against the run folders.
"""

from __future__ import annotations

import io
import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from rich.console import Console

from loopwright import cli
from loopwright.analysis import FrequencyResponse, analyze_loop
from loopwright.procedure.runner import run_procedure_for_serial
from loopwright.production.batch import run_batch
from loopwright.production.index import open_index
from loopwright.production.stats import load_figure_table, population_stats
from mock_instruments.duts import load_dut

pytestmark = pytest.mark.slow

# Invented boards: serial -> load capacitance (F); BUF-05 carries 2.2 nF and fails.
BOARDS = {"BUF-01": 220e-12, "BUF-02": 330e-12, "BUF-03": 470e-12, "BUF-04": 680e-12,
          "BUF-05": 2.2e-9}
PROCEDURE = """\
# Invented procedure for tests: a buffer with a capacitive load, margins judged.
name: buffer-check
sign: 1
method: broken_loop
limits:
  - name: phase margin
    figure: phase_margin_deg
    min: 45
  - name: gain margin
    figure: gain_margin_db
    min: 10
steps:
  - kind: sweep
    start_hz: 1.0e4
    stop_hz: 1.0e7
    points_per_decade: 10
    amplitude_vpp: 0.05
    settle_cycles: 20
    cycles_per_record: 8
    min_samples: 1024
    estimator: dft
"""


def write_bench(folder: Path, load_capacitance_f: float, transport: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    dut = folder / "dut.yaml"
    dut.write_text(f"model: opamp_capload\nload_capacitance_f: {load_capacitance_f!r}\n")
    bench = folder / "bench.yaml"
    bench.write_text(
        "simulated:\n"
        f"  dut: {dut}\n"
        "  noise_v_rms: 1.0e-5\n"
        "  seed: 3\n"
        f"  transport: {transport}\n"
        "max_amplitude_vpp: 2.0\n"
        "max_frequency_hz: 2.0e7\n"
    )
    return bench


def exact_phase_margin_deg(load_capacitance_f: float) -> float:
    dut = load_dut("opamp_capload", load_capacitance_f=load_capacitance_f)
    f = np.geomspace(1e4, 1e7, 4000)
    return analyze_loop(FrequencyResponse(f, dut.loop_response(f))).to_dict()[
        "phase_margin_deg"
    ]


def test_five_spread_boards_through_the_runner(tmp_path: Path) -> None:
    procedure = tmp_path / "procedure.yaml"
    procedure.write_text(PROCEDURE)
    out = tmp_path / "out"

    def run_one(serial: str, *, retest: bool, out_dir: Path):
        # The board on the fixture is what differs: one bench (DUT) per serial.
        bench = write_bench(tmp_path / "benches" / serial, BOARDS[serial], "in_process")
        return run_procedure_for_serial(procedure, bench, serial, out_dir=out_dir,
                                        station="line-1", operator="op", retest=retest)

    summary = run_batch(
        procedure, write_bench(tmp_path / "b0", 470e-12, "in_process"), station="line-1",
        operator="op", out_dir=out, index_url=None,
        input_stream=io.StringIO("".join(f"{s}\n" for s in BOARDS) + "\n"),
        console=Console(file=io.StringIO()), run_one=run_one,
    )
    assert [b.verdict for b in summary.boards] == ["pass"] * 4 + ["fail"]
    assert [lim["name"] for lim in summary.boards[-1].failed_limits] == ["phase margin"]

    with open_index(out, create=False) as index:
        runs = {r["serial"]: r for r in index.list_runs()}
        frame = load_figure_table(index)
    assert set(runs) == set(BOARDS)
    for serial, cap in BOARDS.items():
        folder = Path(runs[serial]["run_dir"])
        manifest = json.loads((folder / "manifest.json").read_text())
        on_disk = json.loads((folder / "summary.json").read_text())
        assert manifest["status"] == "complete" and manifest["serial"] == serial
        assert runs[serial]["procedure_sha256"] == manifest["procedure_sha256"]
        assert runs[serial]["verdict"] == on_disk["verdict"]
        pm = frame.loc[(frame.serial == serial) & (frame.figure == "phase_margin_deg"),
                       "value"].item()
        assert pm == next(x["value"] for x in on_disk["limits"] if x["name"] == "phase margin")
        assert pm == pytest.approx(exact_phase_margin_deg(cap), abs=1.0)

    stats = {s.figure: s for s in population_stats(frame)}
    pms = pd.Series([
        next(x["value"] for x in json.loads((Path(r["run_dir"]) / "summary.json").read_text())
             ["limits"] if x["figure"] == "phase_margin_deg")
        for r in runs.values()
    ])
    assert stats["phase_margin_deg"].mean == pytest.approx(pms.mean(), rel=1e-12)
    assert stats["phase_margin_deg"].std == pytest.approx(pms.std(), rel=1e-12)
    assert stats["phase_margin_deg"].cpk == pytest.approx(
        (pms.mean() - 45) / (3 * pms.std()), rel=1e-12
    )
    assert stats["phase_margin_deg"].failed == 1


def test_batch_command_wired_to_the_runner(tmp_path: Path, monkeypatch, capsys) -> None:
    """``loopwright batch`` through pyvisa-py over loopback TCP; a retest is its own run."""
    procedure = tmp_path / "procedure.yaml"
    procedure.write_text(PROCEDURE)
    bench = write_bench(tmp_path, 330e-12, "tcp")
    monkeypatch.setattr(sys, "stdin", io.StringIO("CMD-1\nCMD-1\n\n"))
    code = cli.main(["batch", str(procedure), "--bench", str(bench), "--station", "st-9",
                     "--operator", "ana", "--out", str(tmp_path / "out")])
    assert code == 0
    assert capsys.readouterr().out.count("PASS: board CMD-1") == 2
    with open_index(tmp_path / "out", create=False) as index:
        runs = sorted(index.list_runs(), key=lambda r: r["started_utc"])
    assert [(r["serial"], r["retest"], r["station"], r["operator"]) for r in runs] == [
        ("CMD-1", False, "st-9", "ana"), ("CMD-1", True, "st-9", "ana")
    ]
    assert runs[0]["run_dir"] != runs[1]["run_dir"]
    manifest = json.loads((Path(runs[1]["run_dir"]) / "manifest.json").read_text())
    assert manifest["retest"] is True and manifest["station"] == "st-9"
