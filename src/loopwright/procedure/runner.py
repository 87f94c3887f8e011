"""The runner: executes a procedure's steps on a bench and writes the run folder.

Per point: set the generator, settle, autorange, acquire both channels on one trigger,
estimate, flag, append to disk (flushed and fsynced), then the next point. After each
sweep the loop figures are computed; after the last step the limits give the verdict,
summary.json is written and the report rendered. The generator output goes off on
every exit (see :mod:`loopwright.procedure.safety`).

The runner knows the roles (Generator, Scope, LoopSwitch), never SCPI.
"""

from __future__ import annotations

import math
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from rich.console import Console
from rich.markup import escape

from loopwright.dsp import fit_sine_4p
from loopwright.errors import (
    DriverError,
    EstimationError,
    InputError,
    InstrumentError,
    LoopwrightError,
    RunError,
    SafetyError,
    SCPIError,
)
from loopwright.instruments.roles import ChannelSettings
from loopwright.procedure.connect import BenchConnection, connect_bench
from loopwright.procedure.measure import PointMeasurer, PointResult, QualityLimits, scale_for
from loopwright.procedure.plan import (
    amplitude_at,
    frequency_plan,
    record_settings,
    refine_points,
    settle_time_s,
)
from loopwright.procedure.progress import RunProgress, format_frequency
from loopwright.procedure.results import loop_figures, point_row, summary_record
from loopwright.procedure.safety import OutputGuard, StopRequested
from loopwright.procedure.schema import (
    Bench,
    CalibrateStep,
    ClosedLoopStep,
    Procedure,
    PromptStep,
    SweepStep,
    check_against_bench,
    load_bench,
    load_procedure,
)
from loopwright.store.load import mismatch_at, read_calibration
from loopwright.store.writer import CALIBRATION_FILE, RunFolder

#: Attempts at one point after an instrument error (each after a reconnect).
MAX_POINT_RETRIES = 2

SAFETY_NOTE = (
    "Loop injection puts a generator into a live feedback loop. Use isolated injection "
    "on mains-referenced or high-energy circuits, mind the probe grounds (they are tied "
    "to earth), start from a small amplitude, and follow local codes and licensed practice."
)


@dataclass
class RunOptions:
    """How a run is started (everything the command line can set).

    Attributes
    ----------
    out_dir
        Folder that holds run folders.
    serial, operator, station
        Recorded in the manifest; the serial also names the run folder.
    resume
        An interrupted run folder to continue.
    quiet
        Only warnings and the result.
    assume_yes
        Allows enabling a real generator's output without a terminal to confirm on.
    input_fn
        Reads the operator's answer to a prompt (default ``input``).
    render_report
        Write report.html and the Bode plot at the end.
    manifest_extra
        Extra manifest fields (``replay_of``, ``reanalysis_of`` ...).
    extra_driver_dirs
        Folders searched for driver files before the shipped ones (``--drivers``).
    """

    out_dir: Path = Path("runs")
    serial: str = "no-serial"
    operator: str | None = None
    station: str | None = None
    resume: Path | None = None
    quiet: bool = False
    assume_yes: bool = False
    input_fn: Callable[[str], str] = input
    render_report: bool = True
    manifest_extra: dict[str, Any] = field(default_factory=dict)
    extra_driver_dirs: tuple[Path, ...] = ()


@dataclass
class RunOutcome:
    """What a finished (or stopped) run left behind.

    Attributes
    ----------
    run_dir
        The run folder.
    status
        ``complete``, ``aborted`` or ``failed`` (as in the manifest).
    reason
        Why the run did not complete (None when it did).
    summary
        summary.json as written, or None when the run stopped before it.
    output_off
        True when the generator output was read back off at the end.
    """

    run_dir: Path
    status: str
    reason: str | None
    summary: dict[str, Any] | None
    output_off: bool


def _scope_limit(scope: Any, name: str, default: float) -> float:
    """The scope driver's maximum of a value (sample rate, points), or a default."""
    limit = getattr(scope, "limit", None)
    if limit is None:
        return default
    value = limit(name, "max")
    return default if not math.isfinite(value) else value


class Runner:
    """Runs one procedure on one open bench into one run folder.

    Parameters
    ----------
    procedure, bench
        Validated files.
    connection
        The open instruments.
    folder
        The run folder (new, or opened for resume).
    console
        Where progress and prompts go.
    options
        See :class:`RunOptions`.
    """

    def __init__(self, procedure: Procedure, bench: Bench, connection: BenchConnection,
                 folder: RunFolder, console: Console, options: RunOptions) -> None:
        self.procedure = procedure
        self.bench = bench
        self.conn = connection
        self.folder = folder
        self.console = console
        self.options = options
        self.progress = RunProgress(console, quiet=options.quiet)
        self.sign = int(procedure.sign)
        self.analysis: dict[str, Any] | None = None
        self.closed_loop: dict[str, Any] | None = None
        self.correction: Callable[[float], complex] | None = None
        self._generator_frequency_hz: float | None = None
        self._generator_amplitude_vpp: float | None = None
        self._timebase: tuple[int, float] | None = None
        self._actual_rate_hz: float = 0.0
        self.max_sample_rate_hz = _scope_limit(connection.scope, "sample_rate_hz", 1e9)
        self.max_record_length = int(_scope_limit(connection.scope, "points", 1_000_000))
        channels = bench.channels
        self.reference_channel = channels.reference
        self.response_channel = channels.response
        self.measurer: PointMeasurer | None = None
        self.recoveries: list[dict[str, Any]] = []

    # ------------------------------------------------------------------ top level

    def run(self) -> dict[str, Any]:
        """Run every step; returns the summary written to summary.json."""
        self._load_existing_calibration()
        with self.progress:
            for index, step in enumerate(self.procedure.steps):
                if isinstance(step, SweepStep):
                    self._sweep(index, step)
                elif isinstance(step, CalibrateStep):
                    self._calibrate(index)
                elif isinstance(step, ClosedLoopStep):
                    self._closed_loop(index, step)
                elif isinstance(step, PromptStep):
                    self._prompt(index, step.text)
        # the output-off guard around the run switches the generator off and confirms it
        return self._summary()

    # ------------------------------------------------------------------ generator

    def _set_output(self, on: bool) -> None:
        """Switch the output; an error the instrument reports afterwards (possibly left
        over from earlier) does not count when the read-back shows the wanted state."""
        try:
            self.conn.generator.set_output(on)
        except SCPIError:
            if self.conn.generator.read_settings().output_on != on:
                raise

    def _set_stimulus(self, frequency_hz: float, amplitude_vpp: float) -> None:
        """Set frequency and amplitude (only what changed), output on."""
        generator = self.conn.generator
        if self._generator_frequency_hz is None:
            generator.set_sine(frequency_hz, amplitude_vpp, 0.0)
            generator.set_output(True)
        else:
            if amplitude_vpp < (self._generator_amplitude_vpp or 0.0):
                # lower the amplitude first so no frequency sees the larger one
                generator.set_amplitude(amplitude_vpp)
                generator.set_frequency(frequency_hz)
            else:
                if frequency_hz != self._generator_frequency_hz:
                    generator.set_frequency(frequency_hz)
                if amplitude_vpp != self._generator_amplitude_vpp:
                    generator.set_amplitude(amplitude_vpp)
        self._generator_frequency_hz = frequency_hz
        self._generator_amplitude_vpp = amplitude_vpp

    # ------------------------------------------------------------------ points

    def _measurer(self, step: Any, first_amplitude_vpp: float) -> PointMeasurer:
        quality = QualityLimits(
            min_snr_db=getattr(step, "flag_snr_below_db", 20.0),
            max_thd_pct=getattr(step, "flag_thd_above_pct", 5.0))
        if self.measurer is None:
            attenuation = self.bench.probe_attenuation
            start_scale = scale_for(first_amplitude_vpp)
            settings = {
                self.reference_channel: ChannelSettings(start_scale, 0.0, "DC",
                                                        attenuation.reference),
                self.response_channel: ChannelSettings(start_scale, 0.0, "DC",
                                                       attenuation.response),
            }
            self.measurer = PointMeasurer(
                self.conn.scope, self.reference_channel, self.response_channel, settings,
                estimator=step.estimator, quality=quality,
                timeout_s=max(10.0, self.bench.timeout_s))
            self.conn.scope.set_trigger(self.reference_channel, 0.0, "rise")
        self.measurer.estimator = step.estimator
        self.measurer.quality = quality
        return self.measurer

    def _measure_at(self, step: Any, frequency_hz: float, *, calibrating: bool
                    ) -> PointResult:
        amplitude_vpp = amplitude_at(step, frequency_hz, self.bench.max_amplitude_vpp)
        measurer = self._measurer(step, amplitude_vpp)
        self._set_stimulus(frequency_hz, amplitude_vpp)
        changed_at = time.monotonic()
        rate, length = record_settings(step, frequency_hz, self.max_sample_rate_hz,
                                       self.max_record_length)
        if self._timebase != (length, rate):
            self._actual_rate_hz = self.conn.scope.set_timebase(length, rate)
            self._timebase = (length, rate)
        measurer.timeout_s = self.bench.timeout_s + 3.0 * length / rate
        # the scope is set up while the DUT settles; wait only what is left
        time.sleep(max(0.0, settle_time_s(step, frequency_hz)
                       - (time.monotonic() - changed_at)))
        return measurer.measure(
            frequency_hz,
            averages=step.averages,
            until_phase_std_deg=step.until_phase_std_deg,
            max_averages=step.max_averages or step.averages,
            autorange=step.autorange,
            correction=None if calibrating else self.correction,
            keep_captures=bool(getattr(step, "keep_captures", False)),
        )

    def _retrying(self, action: Callable[[], PointResult], frequency_hz: float) -> PointResult:
        """Run ``action``; after an instrument error reconnect, restore the set-up, retry.

        SCPI errors (the instrument refused something) are retried without a
        reconnect. After :data:`MAX_POINT_RETRIES` retries the error goes up and the run
        stops with it as the reason; the points measured so far stay on disk.
        """
        for attempt in range(MAX_POINT_RETRIES + 1):
            try:
                return action()
            except InstrumentError as exc:
                record = {"frequency_hz": frequency_hz, "attempt": attempt + 1,
                          "error": f"{type(exc).__name__}: {exc}",
                          "action": "gave up" if attempt == MAX_POINT_RETRIES else "retry"}
                if attempt < MAX_POINT_RETRIES and not isinstance(exc, SCPIError):
                    record["action"] = "reconnect and retry"
                self.recoveries.append(record)
                if attempt == MAX_POINT_RETRIES:
                    raise
                self.progress.warn(f"{format_frequency(frequency_hz)}: {exc};"
                                   f" {record['action']}")
                if not isinstance(exc, SCPIError):
                    self._reconnect()
        raise AssertionError("unreachable")

    def _reconnect(self) -> None:
        """Reopen generator and scope, then put back what the runner had set."""
        for role in ("scope", "generator"):
            try:
                self.conn.reopen(role)
            except InstrumentError as exc:
                self.progress.warn(f"reconnecting the {role} failed: {exc}")
        self._generator_frequency_hz = None
        self._generator_amplitude_vpp = None
        self._timebase = None
        if self.measurer is not None:
            self.measurer.rebind(self.conn.scope)
            self.conn.scope.set_trigger(self.reference_channel, 0.0, "rise")

    def _store(self, step_index: int, nominal_hz: float, amplitude_vpp: float,
               result: PointResult, refined: bool) -> complex:
        """Append one point; returns the stored (signed) H."""
        row = point_row(step_index, nominal_hz, amplitude_vpp, result, self.sign, refined)
        index = self.folder.append_point(row)
        if result.captures:
            capture = result.captures[-1]
            self.folder.save_capture(index, capture.volts[self.reference_channel],
                                     capture.volts[self.response_channel],
                                     capture.sample_rate_hz, nominal_hz, amplitude_vpp)
        self.progress.point(index, nominal_hz, row["gain_db"], row["phase_deg"], result.flags)
        return complex(row["gain_re"], row["gain_im"])

    # ------------------------------------------------------------------ steps

    def _sweep(self, index: int, step: SweepStep) -> None:
        plan = frequency_plan(step)
        done = self.folder.done_in_step(index)
        measured_f = [float(p["frequency_hz"]) for p in done]
        measured_h = [complex(float(p["gain_re"]), float(p["gain_im"])) for p in done]
        refined_count = sum(int(p.get("refined") or 0) for p in done)
        label = step.label or f"sweep (step {index + 1})"
        todo = [f for f in plan if not self.folder.is_done(index, float(f))]
        self.progress.start_step(label, len(todo))
        for frequency_hz in todo:
            self._sweep_point(index, step, float(frequency_hz), False, measured_f, measured_h)
        if step.refine is not None:
            while True:
                extra = refine_points(np.array(measured_f), np.array(measured_h), step.refine,
                                      already_added=refined_count)
                if extra.size == 0:
                    break
                self.progress.add_planned(int(extra.size))
                for frequency_hz in extra:
                    self._sweep_point(index, step, float(frequency_hz), True,
                                      measured_f, measured_h)
                    refined_count += 1
        self._analyse(measured_f, measured_h, index)

    def _sweep_point(self, index: int, step: SweepStep, frequency_hz: float, refined: bool,
                     measured_f: list[float], measured_h: list[complex]) -> None:
        amplitude_vpp = amplitude_at(step, frequency_hz, self.bench.max_amplitude_vpp)
        try:
            result = self._retrying(
                lambda: self._measure_at(step, frequency_hz, calibrating=False), frequency_hz)
        except EstimationError as exc:
            # the point cannot be estimated (e.g. a flat reference): record why, go on
            self.recoveries.append({"frequency_hz": frequency_hz, "attempt": 1,
                                    "error": f"{type(exc).__name__}: {exc}",
                                    "action": "point skipped"})
            self.progress.warn(f"{format_frequency(frequency_hz)}: {exc}; point skipped")
            return
        measured_h.append(self._store(index, frequency_hz, amplitude_vpp, result, refined))
        measured_f.append(frequency_hz)

    def _analyse(self, measured_f: list[float], measured_h: list[complex], index: int) -> None:
        if len(measured_f) < 2:
            self.progress.warn(f"step {index + 1}: fewer than 2 points; no loop figures")
            return
        try:
            self.analysis = loop_figures(measured_f, measured_h)
        except LoopwrightError as exc:
            self.progress.warn(f"step {index + 1}: no loop figures: {exc}")

    def _calibrate(self, index: int) -> None:
        if (self.folder.path / CALIBRATION_FILE).exists() and self.correction is not None:
            self.progress.message("channel calibration already stored; kept")
            return
        step = self.procedure.calibration_plan(index)
        probes = self.conn.switch if step.switch == "relay" else None
        if step.switch == "relay":
            if probes is None or not getattr(probes, "can_join_probes", False):
                raise RunError("calibrate_channels with switch: relay needs a switch on the"
                               " bench whose driver can join the probes")
            probes.set_probes_joined(True)
        elif step.text:
            self._prompt(index, step.text)
        plan = frequency_plan(step)
        self.progress.start_step(step.label or "channel calibration", len(plan))
        mismatch = []
        try:
            for frequency_hz in plan:
                result = self._retrying(
                    lambda f=float(frequency_hz): self._measure_at(step, f, calibrating=True),
                    float(frequency_hz))
                mismatch.append(result.gain)
                self.progress.point(-1, float(frequency_hz), result.gain_db,
                                    result.phase_deg, result.flags)
        finally:
            if probes is not None:
                probes.set_probes_joined(False)
        self.folder.write_calibration(plan, mismatch)
        self._load_existing_calibration()

    def _load_existing_calibration(self) -> None:
        path = self.folder.path / CALIBRATION_FILE
        if not path.exists():
            return
        cal_f, cal_h = read_calibration(path)
        self.correction = lambda f: complex(mismatch_at(f, cal_f, cal_h))

    def _prompt(self, index: int, text: str) -> None:
        if self.options.resume is not None and self.folder.done_points and any(
                int(p["step"]) > index for p in self.folder.done_points):
            return  # the steps after this prompt already ran before the interruption
        if self._generator_frequency_hz is not None:
            # the operator may touch the board: no stimulus while they do; the next
            # point sets the generator up afresh and switches it on again
            self._set_output(False)
            self._generator_frequency_hz = None
        self.console.print(f"[bold]operator:[/] {escape(text)}")
        try:
            self.options.input_fn("Press Enter to continue ")
        except EOFError as exc:
            raise RunError(f"step {index + 1} asks the operator ({text!r}) but there is no"
                           " input; run it at a terminal or remove the prompt step") from exc

    def _closed_loop(self, index: int, step: ClosedLoopStep) -> None:
        predicted = None
        if self.analysis:
            predicted = self.analysis.get("oscillation_frequency_hz")
        expected = predicted or step.expected_frequency_hz
        if expected is None:
            raise RunError(
                f"step {index + 1} (closed_loop_check): the open-loop sweep predicts no"
                " oscillation and the step gives no expected_frequency_hz; add one")
        expected = float(expected)
        if expected > self.bench.max_frequency_hz:
            raise SafetyError(f"closed-loop check at {expected:g} Hz is above the bench cap"
                              f" max_frequency_hz = {self.bench.max_frequency_hz:g} Hz")
        self._set_output(False)
        self._generator_frequency_hz = None
        self._close_loop(step, True)
        try:
            time.sleep(step.settle_s)
            self.closed_loop = self._measure_free_running(step, expected, predicted)
        finally:
            self._close_loop(step, False)

    def _close_loop(self, step: ClosedLoopStep, closed: bool) -> None:
        if step.switch == "relay":
            if self.conn.switch is None:
                raise RunError("closed_loop_check with switch: relay needs a loop switch"
                               " on the bench")
            self.conn.switch.set_closed(closed)
            return
        text = (step.close_text or "Close the loop now.") if closed else (
            step.open_text or "Open the loop again.")
        self.console.print(f"[bold]operator:[/] {escape(text)}")
        try:
            self.options.input_fn("Press Enter when done ")
        except EOFError as exc:
            raise RunError("the closed-loop check needs an operator at the terminal") from exc

    def _measure_free_running(self, step: ClosedLoopStep, expected_hz: float,
                              predicted_hz: float | None) -> dict[str, Any]:
        """Record the free-running oscillation on the response channel and fit it."""
        duration_s = step.record_cycles / expected_hz
        rate = min(self.max_sample_rate_hz, max(50 * expected_hz, 4096 / duration_s))
        length = min(self.max_record_length, math.ceil(rate * duration_s))
        self._actual_rate_hz = self.conn.scope.set_timebase(length, rate)
        self._timebase = (length, rate)
        measurer = self.measurer or self._measurer(
            SweepStep(kind="sweep", frequencies_hz=[expected_hz], amplitude_vpp=0.01),
            0.01)
        # this record may be far longer than the last sweep point's: wait for all of it
        measurer.timeout_s = self.bench.timeout_s + 3.0 * length / rate
        capture, clipped = measurer.acquire_ranged(autorange=True)
        volts = capture.volts[self.response_channel]
        fs = capture.sample_rate_hz
        try:
            fit = fit_sine_4p(volts, fs, expected_hz, harmonics=9, max_offset_ppm=150_000.0)
        except EstimationError as exc:
            raise RunError(f"no oscillation seen with the loop closed: {exc}") from exc
        frequency_hz = float(fit.frequency_hz)
        amplitude_v = float(fit.amplitude_v)
        noise_rms = math.sqrt(float(fit.noise_var_v2))
        oscillating = amplitude_v > 10 * noise_rms and amplitude_v > 1e-6
        periods = min(5.0, frequency_hz * len(volts) / fs)
        keep = int(min(len(volts), math.ceil(periods / frequency_hz * fs)))
        self.folder.write_closed_loop(np.arange(keep) / fs, volts[:keep])
        error_pct = None
        if predicted_hz:
            error_pct = 100.0 * (frequency_hz - predicted_hz) / predicted_hz
        result = {
            "frequency_hz": frequency_hz if oscillating else None,
            "amplitude_v": amplitude_v,
            "thd_pct": float(fit.thd_pct) if oscillating else None,
            "predicted_frequency_hz": predicted_hz,
            "frequency_error_pct": error_pct if oscillating else None,
            "oscillating": bool(oscillating),
            "clipped": bool(clipped),
            "tolerance_pct": step.frequency_tolerance_pct,
            "within_tolerance": bool(oscillating and error_pct is not None
                                     and abs(error_pct) <= step.frequency_tolerance_pct),
        }
        if oscillating:
            self.progress.message(
                f"closed loop: oscillates at {format_frequency(frequency_hz)},"
                f" {amplitude_v:.4g} V amplitude, THD {result['thd_pct']:.2f} %")
        else:
            self.progress.warn("closed loop: no oscillation seen")
        return result

    # ------------------------------------------------------------------ results

    def _summary(self) -> dict[str, Any]:
        points, flagged = _count_points(self.folder.path / "points.csv")
        summary = summary_record(self.procedure, self.analysis, self.closed_loop, points,
                                 flagged)
        self.folder.write_summary(summary)
        return summary


def _count_points(path: Path) -> tuple[int, int]:
    """(points, flagged points) in points.csv."""
    if not path.exists():
        return 0, 0
    import pandas as pd

    frame = pd.read_csv(path, keep_default_na=False, dtype={"flags": str})
    flagged = int((frame["flags"].astype(str).str.len() > 0).sum()) if len(frame) else 0
    return len(frame), flagged


def _needs_confirmation(bench: Bench, options: RunOptions) -> bool:
    return bench.simulated is None and not options.assume_yes and not sys.stdin.isatty()


def run_procedure(procedure_path: str | Path, bench_path: str | Path,
                  options: RunOptions | None = None, console: Console | None = None
                  ) -> RunOutcome:
    """Validate, connect, run and record one procedure on one bench.

    Parameters
    ----------
    procedure_path, bench_path
        The YAML files.
    options
        See :class:`RunOptions`.
    console
        Where progress goes (default: stdout).

    Returns
    -------
    RunOutcome
        The run folder, final status and summary. A run stopped by Ctrl-C or SIGTERM
        returns with status ``aborted`` (its points are on disk; resume it with
        ``--resume``); other failures raise after the manifest records them.

    Raises
    ------
    InputError, SafetyError
        Bad files or a procedure above a bench cap: nothing was opened or sent.
    """
    options = options or RunOptions()
    console = console or Console()
    procedure = load_procedure(procedure_path)
    bench = load_bench(bench_path)
    check_against_bench(procedure, bench)
    if _needs_confirmation(bench, options):
        raise SafetyError(
            "this bench drives real instruments and there is no terminal to confirm on;"
            " pass --yes to allow the generator output to be switched on")
    if bench.simulated is None and not options.quiet:
        console.print(f"[bold yellow]caution:[/] {SAFETY_NOTE}")
    if options.resume is not None:
        folder = RunFolder.open_for_resume(options.resume)
        _check_resume_matches(folder, procedure)
    else:
        manifest = {
            "operator": options.operator,
            "station": options.station,
            "procedure": procedure.record(),
            "procedure_file": str(procedure_path),
            "procedure_sha256": procedure.sha256,
            "bench": bench.model_dump(mode="json"),
            "bench_file": str(bench_path),
            **options.manifest_extra,
        }
        folder = RunFolder.create(options.out_dir, procedure.name, options.serial, manifest)
    status, reason, summary = "failed", None, None
    output_off = False
    with folder:
        try:
            connection = connect_bench(bench, folder.traffic_log_path,
                                       options.extra_driver_dirs)
        except LoopwrightError as exc:
            folder.finish("failed", f"cannot open the bench: {exc}")
            raise
        try:
            check_feasible(procedure, connection)
        except LoopwrightError as exc:
            folder.finish("failed", f"refused before any output: {exc}")
            connection.close()
            raise
        folder.update_manifest(status="running", instruments=connection.instruments,
                               simulated=connection.simulated)
        guard = OutputGuard(lambda: connection.generator, connection.reopen_generator)
        runner = None
        try:
            with guard:
                runner = Runner(procedure, bench, connection, folder, console, options)
                summary = runner.run()
            status = "complete"
        except KeyboardInterrupt:
            status, reason = "aborted", "interrupted by Ctrl-C"
        except StopRequested:
            status, reason = "aborted", "stopped by SIGTERM"
        except InstrumentError as exc:
            status, reason = "failed", f"instrument: {exc}"
        except LoopwrightError as exc:
            status, reason = "failed", str(exc)
        except Exception as exc:
            status, reason = "failed", f"internal error: {type(exc).__name__}: {exc}"
            folder.finish(status, reason)
            connection.close()
            raise
        finally:
            output_off = guard.output_off_confirmed
            if status != "complete" and reason is None:
                reason = "unknown"
        folder.update_manifest(output_off_confirmed=output_off,
                               recoveries=runner.recoveries if runner is not None else [])
        folder.finish(status, reason)
        connection.close()
    if status == "complete" and options.render_report:
        _render(folder.path, console)
    if status == "failed":
        raise RunError(f"run failed ({reason}); its points are kept in {folder.path};"
                       f" continue it with --resume {folder.path}")
    return RunOutcome(folder.path, status, reason, summary, output_off)


def check_feasible(procedure: Procedure, connection: BenchConnection) -> None:
    """Refuse, before any output, a plan these instruments cannot carry out.

    The bench's reference and response channels are checked against the scope
    driver's channels; every planned frequency and amplitude of every sweep and
    calibration (and, for a refined sweep, the amplitude at each profile corner inside
    the plan) against the generator driver's limits, and every frequency against
    what the scope can record (enough cycles and samples per cycle); the first problem
    names the bench field or the step.

    Raises
    ------
    InputError
        A planned value is outside what the instruments can do (exit code 2).
    """
    generator, scope = connection.generator, connection.scope
    channel_text = getattr(scope, "channel", None)
    if channel_text is not None:
        bench = connection.bench
        for name in ("reference", "response"):
            try:
                channel_text(getattr(bench.channels, name))
            except DriverError as exc:
                message = (f"{exc} (scope driver"
                           f" {connection.instruments['scope']['driver']})")
                if bench.source is not None:
                    raise bench.source.error(("channels", name), message) from exc
                raise InputError(message, field=f"channels.{name}") from exc
    max_rate = _scope_limit(scope, "sample_rate_hz", 1e9)
    max_length = int(_scope_limit(scope, "points", 1_000_000))
    limit = getattr(generator, "limit", None)
    for index, step in enumerate(procedure.steps):
        if isinstance(step, CalibrateStep):
            step = procedure.calibration_plan(index)
        elif not isinstance(step, SweepStep):
            continue
        def refuse(message: str, index: int = index) -> InputError:
            if procedure.source is not None:
                return procedure.source.error(("steps", index), message)
            return InputError(message, field=f"steps[{index}]")

        planned = frequency_plan(step)
        profile = getattr(step, "amplitude_profile", None)
        if getattr(step, "refine", None) is not None and profile is not None and planned.size:
            # refinement adds points between planned ones; an amplitude corner there is
            # the largest (or smallest) amplitude such a point can get
            corners = np.array([p.frequency_hz for p in profile], dtype=float)
            inside = corners[(corners > planned[0]) & (corners < planned[-1])]
            planned = np.union1d(planned, inside)
        for frequency_hz in planned:
            f = float(frequency_hz)
            try:
                record_settings(step, f, max_rate, max_length)
            except InputError as exc:
                raise refuse(exc.message) from exc
            amplitude_vpp = amplitude_at(step, f, connection.bench.max_amplitude_vpp)
            if limit is None:
                continue
            for name, value in (("frequency_hz", f), ("amplitude_vpp", amplitude_vpp)):
                low, high = limit(name, "min"), limit(name, "max")
                if not low <= value <= high:
                    raise refuse(
                        f"{name} = {value:g} is outside what the generator"
                        f" ({connection.instruments['generator']['driver']}) can do,"
                        f" {low:g} to {high:g}; change the plan or the amplitude")


def _check_resume_matches(folder: RunFolder, procedure: Procedure) -> None:
    stored = folder.manifest.get("procedure_sha256")
    if stored and procedure.sha256 and stored != procedure.sha256:
        raise RunError(f"{folder.path}: the procedure file changed since this run started;"
                       " resume needs the same procedure (start a new run instead)")


def _render(run_dir: Path, console: Console) -> None:
    try:
        from loopwright.report import render_report
    except ImportError:
        return
    try:
        render_report(run_dir)
    except LoopwrightError as exc:
        console.print(f"[bold yellow]warning:[/] the report was not rendered: {escape(str(exc))}")
    except Exception as exc:  # a plotting bug must not fail a finished run
        console.print(f"[bold yellow]warning:[/] the report was not rendered (a bug:"
                      f" {type(exc).__name__}: {exc}); the run folder is complete;"
                      f" try `loopwright report {run_dir}` after an update")


def run_procedure_for_serial(procedure_path: str | Path, bench_path: str | Path, serial: str,
                             *, out_dir: str | Path, station: str | None = None,
                             operator: str | None = None, retest: bool = False,
                             console: Console | None = None
                             ) -> tuple[Path, dict[str, Any] | None]:
    """One production run (the batch command's runner): returns (run folder, summary)."""
    options = RunOptions(out_dir=Path(out_dir), serial=serial, operator=operator,
                         station=station, quiet=True,
                         manifest_extra={"retest": bool(retest)})
    outcome = run_procedure(procedure_path, bench_path, options, console)
    if outcome.status == "aborted":
        raise KeyboardInterrupt
    return outcome.run_dir, outcome.summary


__all__ = ["RunOptions", "RunOutcome", "Runner", "run_procedure", "run_procedure_for_serial"]
