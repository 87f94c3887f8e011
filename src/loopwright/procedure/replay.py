"""Replay: a stored run becomes a simulated board, and a procedure runs against it.

The board is :class:`mock_instruments.duts.measured.MeasuredResponseDUT` (the stored
response as the analysis interpolates it, each channel's noise from the stored SNR,
the stored channel mismatch on the response channel). It is served by the simulated
bench on loopback TCP and measured by the ordinary runner through pyvisa-py, so a
replay exercises the same code as a run on hardware.

The files the replay made (the board's DUT file, the bench file and, by default, the
stored procedure written back to YAML) are kept in the new run folder under
``replay/``, and the manifest says ``replay_of`` (the source folder),
``replay_source_procedure_sha256`` and ``replay_board`` (what was modelled).

A stored channel calibration cannot be measured again on the simulated bench (its
probes cannot both be put on one node), so a replayed procedure with a
``calibrate_channels`` step is given the stored calibration.csv as its own; the
manifest says ``replay_calibration: "copied from the source run"``. A stored
closed-loop check that asked the operator to close the loop (``switch: prompt``) uses
the simulated loop switch instead (``replay_procedure_changes`` in the manifest).
"""

from __future__ import annotations

import copy
import shutil
import tempfile
from pathlib import Path
from typing import Any

import yaml
from rich.console import Console

from loopwright.errors import InputError, LoopwrightError
from loopwright.procedure.runner import RunOptions, RunOutcome, run_procedure
from loopwright.procedure.schema import CalibrateStep, load_bench, load_procedure
from loopwright.store import load_run
from loopwright.store.writer import RunFolder

#: Where the replay's own input files go inside the new run folder.
REPLAY_DIR = "replay"
#: Safety caps used when the stored run recorded no bench (a simulated board only).
FALLBACK_MAX_AMPLITUDE_VPP = 10.0
FALLBACK_MAX_FREQUENCY_HZ = 1.0e9


def check_replayable(run_dir: str | Path) -> Any:
    """Load a run folder and check it has points to replay.

    Raises
    ------
    InputError
        Not a run folder, or no stored points.
    """
    path = Path(run_dir)
    if not path.is_dir():
        raise InputError("not a folder", path=str(path))
    run = load_run(path)
    if run.points.empty:
        raise InputError("the run stored no points; nothing to replay or reanalyse",
                         path=str(path))
    return run


def _stored_procedure_text(run: Any) -> tuple[str, list[str]]:
    """The stored procedure as YAML, and what was changed for the simulated board.

    A closed-loop check that asked the operator to close the loop uses the simulated
    bench's loop switch instead (nobody can close a simulated loop by hand).
    """
    record = run.manifest.get("procedure")
    if not isinstance(record, dict) or not isinstance(record.get("steps"), list):
        raise InputError("the manifest holds no procedure; give one with --procedure",
                         path=str(run.path / "manifest.json"), field="procedure")
    record = copy.deepcopy(record)
    changes = []
    for number, step in enumerate(record["steps"], start=1):
        if isinstance(step, dict) and step.get("kind") == "closed_loop_check" \
                and step.get("switch") == "prompt":
            step["switch"] = "relay"
            step.pop("close_text", None)
            step.pop("open_text", None)
            changes.append(f"step {number}: switch prompt -> relay (the simulated loop"
                           " switch)")
    header = (f"# The procedure of {run.path.name} as it ran, written back for its replay.\n")
    return header + yaml.safe_dump(record, sort_keys=False), changes


def _bench_text(run: Any, seed: int | None) -> str:
    stored = run.manifest.get("bench") if isinstance(run.manifest.get("bench"), dict) else {}
    caps = {
        "max_amplitude_vpp": stored.get("max_amplitude_vpp") or FALLBACK_MAX_AMPLITUDE_VPP,
        "max_frequency_hz": stored.get("max_frequency_hz") or FALLBACK_MAX_FREQUENCY_HZ,
        "timeout_s": stored.get("timeout_s") or 5.0,
    }
    data = {
        "simulated": {"dut": "dut.yaml", "noise_v_rms": 0.0, "seed": seed,
                      "real_time": False, "transport": "tcp"},
        # the simulated scope: stimulus on channel 1, returned signal on channel 2
        "channels": {"reference": 1, "response": 2},
        **caps,
    }
    if seed is None:
        del data["simulated"]["seed"]
    return ("# The simulated bench of a replay; the caps are the source run's.\n"
            + yaml.safe_dump(data, sort_keys=False))


def replay_run(run_dir: str | Path, *, procedure: str | Path | None = None,
               out_dir: str | Path | None = None, seed: int | None = 1,
               step: int | None = None, quiet: bool = True, render_report: bool = True,
               console: Console | None = None) -> RunOutcome:
    """Replay a stored run on the simulated bench.

    Parameters
    ----------
    run_dir
        The source run folder (never changed).
    procedure
        The procedure to run (default: the stored one, as it ran).
    out_dir
        Folder for the new run folder (default: the source run's parent).
    seed
        Seed of the bench's noise (None: a fresh one each time).
    step
        The sweep step whose response the board replays (default: the last with points).

    Returns
    -------
    RunOutcome
        As :func:`loopwright.procedure.runner.run_procedure`.

    Raises
    ------
    InputError
        Not a run, no points, no stored procedure and none given, a bad procedure.
    """
    from mock_instruments.duts.measured import MeasuredResponseDUT

    run = check_replayable(run_dir)
    source = run.path.resolve()
    board = MeasuredResponseDUT.from_run(source, step=step)
    target = Path(out_dir) if out_dir is not None else source.parent
    console = console or Console()
    work = Path(tempfile.mkdtemp(prefix="loopwright-replay-"))
    try:
        dut_file = work / "dut.yaml"
        dut_data: dict[str, Any] = {"model": "measured_response", "run": str(source)}
        if step is not None:
            dut_data["step"] = step
        dut_file.write_text("# The board of a replay: a stored run's measured response.\n"
                            + yaml.safe_dump(dut_data, sort_keys=False), encoding="utf-8")
        bench_file = work / "bench.yaml"
        bench_file.write_text(_bench_text(run, seed), encoding="utf-8")
        changes: list[str] = []
        if procedure is None:
            procedure_file = work / "procedure.yaml"
            text, changes = _stored_procedure_text(run)
            procedure_file.write_text(text, encoding="utf-8")
        else:
            procedure_file = Path(procedure)
        parsed = load_procedure(procedure_file)
        serial = str(run.manifest.get("serial") or "no-serial")
        extra = {
            "replay_of": str(source),
            "replay_source_procedure_sha256": run.manifest.get("procedure_sha256"),
            "replay_board": board.describe(),
            "simulated": True,
        }
        if changes:
            extra["replay_procedure_changes"] = changes
        options = RunOptions(out_dir=target, serial=serial, quiet=quiet,
                             render_report=render_report, manifest_extra=extra,
                             # nobody stands at a simulated board: prompts answer themselves
                             input_fn=lambda _prompt: "")
        calibration = run.calibration
        if calibration is not None and any(isinstance(s, CalibrateStep)
                                           for s in parsed.steps):
            options.resume = _seed_calibration(parsed, procedure_file, bench_file, target,
                                               serial, extra, calibration)
        outcome = run_procedure(procedure_file, bench_file, options, console)
        _keep_inputs(outcome.run_dir, work, procedure is None)
        return outcome
    finally:
        shutil.rmtree(work, ignore_errors=True)


def _seed_calibration(procedure: Any, procedure_file: Path, bench_file: Path, target: Path,
                      serial: str, extra: dict[str, Any], calibration: Any) -> Path:
    """A new run folder that holds the stored calibration, for the runner to continue.

    The runner keeps a calibration already in its folder (as after a resume), so the
    calibrate step does not try to measure what the simulated bench cannot show.
    """
    bench = load_bench(bench_file)
    manifest = {
        "procedure": procedure.record(),
        "procedure_file": str(procedure_file),
        "procedure_sha256": procedure.sha256,
        "bench": bench.model_dump(mode="json"),
        "bench_file": str(bench_file),
        **extra,
        "replay_calibration": "copied from the source run (the simulated bench cannot "
                              "put both probes on one node)",
    }
    folder = RunFolder.create(target, procedure.name, serial, manifest)
    with folder:
        folder.write_calibration(*calibration)
    return folder.path


def _keep_inputs(run_dir: Path, work: Path, stored_procedure: bool) -> None:
    """Copy the replay's DUT, bench (and procedure) files into the run folder."""
    keep = run_dir / REPLAY_DIR
    keep.mkdir(exist_ok=True)
    for name in ("dut.yaml", "bench.yaml") + (("procedure.yaml",) if stored_procedure else ()):
        shutil.copy2(work / name, keep / name)
    try:
        folder = RunFolder(run_dir, load_run(run_dir).manifest)
        fields: dict[str, Any] = {"bench_file": str(keep / "bench.yaml")}
        if stored_procedure:
            fields["procedure_file"] = str(keep / "procedure.yaml")
        folder.update_manifest(**fields)
    except LoopwrightError:
        pass  # the run itself is complete; only the file paths stay the temporary ones


__all__ = ["check_replayable", "replay_run"]
