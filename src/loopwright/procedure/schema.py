"""Procedure and bench files: pydantic models, loading, and the safety check.

Both files are YAML of our own, read through :func:`loopwright.yamlfile.load_yaml`
and :func:`loopwright.yamlfile.validate`, so every problem ends in an
:class:`~loopwright.errors.InputError` naming file, line and field, with the allowed
keys or values and a "did you mean" for a near miss.

Steps are a list of mappings tagged by ``kind`` (``sweep``, ``calibrate_channels``,
``closed_loop_check``, ``prompt``). Keys carry their units (``start_hz``,
``settle_s``, ``amplitude_vpp``). Strings from these files (names, prompt text,
limit names) are shown to people and written to the run folder; they never reach an
instrument.

Public API
----------
- :func:`load_bench`, :func:`loads_bench` -> :class:`Bench`
- :func:`load_procedure`, :func:`loads_procedure` -> :class:`Procedure`
- :func:`check_against_bench` raises :class:`~loopwright.errors.SafetyError` when a
  procedure would exceed a cap of the bench.
"""

from __future__ import annotations

import difflib
import hashlib
import math
import re
import typing
import unicodedata
from pathlib import Path
from typing import Annotated, Any, Literal, Union

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PrivateAttr,
    ValidationInfo,
    field_validator,
    model_validator,
)

from loopwright.errors import InputError, SafetyError
from loopwright.procedure.plan import frequency_plan, planned_count
from loopwright.yamlfile import FieldPath, YamlSource, format_loc, load_yaml, loads_yaml, validate

#: Most points a frequency plan may hold (before adaptive refinement).
MAX_PLANNED_POINTS = 100_000
#: Most extra points adaptive refinement may add to one sweep.
MAX_EXTRA_POINTS = 10_000
#: Highest frequency any file may name, a sanity bound (the bench cap is the real one).
MAX_ANY_FREQUENCY_HZ = 1e12
#: Longest single-line text (names) and multi-line text (prompts).
MAX_NAME_CHARS = 200
MAX_TEXT_CHARS = 4000

#: Loop figures a limit may test, with their unit. :func:`figure_value` finds each in
#: the analysis (``LoopFigures.to_dict()``) or, for ``closed_loop_*``, in the run's
#: closed-loop results.
FIGURES: dict[str, str] = {
    "phase_margin_deg": "deg",
    "gain_margin_db": "dB",
    "crossover_frequency_hz": "Hz",
    "gain_margin_frequency_hz": "Hz",
    "oscillation_frequency_hz": "Hz",
    "excess_gain": "",
    "resonance_frequency_hz": "Hz",
    "resonance_peak_db": "dB",
    "resonance_q": "",
    "bandwidth_hz": "Hz",
    "closed_loop_frequency_hz": "Hz",
    "closed_loop_amplitude_v": "V",
    "closed_loop_thd_pct": "%",
    "closed_loop_frequency_error_pct": "%",
}

Figure = Literal[
    "phase_margin_deg",
    "gain_margin_db",
    "crossover_frequency_hz",
    "gain_margin_frequency_hz",
    "oscillation_frequency_hz",
    "excess_gain",
    "resonance_frequency_hz",
    "resonance_peak_db",
    "resonance_q",
    "bandwidth_hz",
    "closed_loop_frequency_hz",
    "closed_loop_amplitude_v",
    "closed_loop_thd_pct",
    "closed_loop_frequency_error_pct",
]

STEP_KINDS = ("sweep", "calibrate_channels", "closed_loop_check", "prompt")
ESTIMATOR_NAMES = ("sinefit", "dft", "xcorr")


# --------------------------------------------------------------------------- values


def _no_bool(value: Any) -> Any:
    # YAML's yes/no/true read as bool, and pydantic would take them as 1/0.
    if isinstance(value, bool):
        raise ValueError("expected a number, not true/false")
    if isinstance(value, float) and not math.isfinite(value):
        raise ValueError("must be a finite number")
    return value


def _check_text(value: str, *, multiline: bool, limit: int) -> str:
    if not value.strip():
        raise ValueError("must not be empty")
    if len(value) > limit:
        raise ValueError(f"longer than {limit} characters")
    for char in value:
        if multiline and char in "\n\t":
            continue
        if unicodedata.category(char) in ("Cc", "Cf", "Cs", "Co", "Cn", "Zl", "Zp"):
            raise ValueError(
                f"contains a control or unprintable character (U+{ord(char):04X});"
                " use plain printable text")
    return value


def _name_text(value: str) -> str:
    return _check_text(value, multiline=False, limit=MAX_NAME_CHARS)


def _long_text(value: str) -> str:
    return _check_text(value, multiline=True, limit=MAX_TEXT_CHARS)


Number = Annotated[float, BeforeValidator(_no_bool), Field(allow_inf_nan=False)]
PositiveNumber = Annotated[float, BeforeValidator(_no_bool), Field(gt=0, allow_inf_nan=False)]
NonNegativeNumber = Annotated[float, BeforeValidator(_no_bool),
                              Field(ge=0, allow_inf_nan=False)]
FrequencyHz = Annotated[float, BeforeValidator(_no_bool),
                        Field(gt=0, le=MAX_ANY_FREQUENCY_HZ, allow_inf_nan=False)]
Count = Annotated[int, BeforeValidator(_no_bool)]
NameText = Annotated[str, AfterValidator(_name_text)]
LongText = Annotated[str, AfterValidator(_long_text)]
ResourceText = Annotated[str, AfterValidator(_name_text)]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


# --------------------------------------------------------------------------- bench


class InstrumentEntry(_Model):
    """One instrument of the bench: where it is and, optionally, which driver speaks it."""

    resource: ResourceText = Field(description="VISA resource string")
    driver: NameText | None = Field(
        None, description="driver name; absent = chosen by the *IDN? reply")


class ChannelMap(_Model):
    """Scope channels (1-based) that see the stimulus and the returned signal."""

    reference: Annotated[Count, Field(ge=1, le=16)] = 1
    response: Annotated[Count, Field(ge=1, le=16)] = 2

    @field_validator("response")
    @classmethod
    def _distinct(cls, value: int, info: ValidationInfo) -> int:
        if info.data.get("reference") == value:
            raise ValueError("reference and response must be different scope channels")
        return value


class ProbeAttenuation(_Model):
    """Probe attenuation of the reference and response channels (10 = a 10:1 probe)."""

    reference: Annotated[float, BeforeValidator(_no_bool),
                         Field(gt=0, le=10_000, allow_inf_nan=False)] = 1.0
    response: Annotated[float, BeforeValidator(_no_bool),
                        Field(gt=0, le=10_000, allow_inf_nan=False)] = 1.0


class SimulatedBenchEntry(_Model):
    """The simulated bench in place of real instruments."""

    dut: NameText = Field(description="a registered DUT model name or a DUT YAML file")
    noise_v_rms: NonNegativeNumber = 0.0
    seed: Annotated[Count, Field(ge=0)] | None = None
    real_time: bool = Field(False, description="wait out settling and record times")
    transport: Literal["tcp", "in_process"] = Field(
        "tcp", description="loopback TCP through pyvisa-py, or the in-process backend")


class Bench(_Model):
    """A bench file: roles -> instruments, scope channels, and the safety caps."""

    generator: InstrumentEntry | None = None
    scope: InstrumentEntry | None = None
    switch: InstrumentEntry | None = None
    simulated: SimulatedBenchEntry | None = None
    backend: NameText = Field("@py", description="pyvisa backend, '@py' = pyvisa-py")
    timeout_s: Annotated[float, BeforeValidator(_no_bool),
                         Field(gt=0, le=600, allow_inf_nan=False)] = 5.0
    channels: ChannelMap = ChannelMap()
    probe_attenuation: ProbeAttenuation = ProbeAttenuation()
    max_amplitude_vpp: Annotated[float, BeforeValidator(_no_bool),
                                 Field(gt=0, le=1000, allow_inf_nan=False)]
    max_frequency_hz: FrequencyHz

    _source: YamlSource | None = PrivateAttr(None)

    @model_validator(mode="after")
    def _roles(self) -> Bench:
        if self.simulated is not None:
            given = [n for n in ("generator", "scope", "switch") if getattr(self, n) is not None]
            if given:
                raise ValueError(
                    f"a simulated bench has no {given[0]!r}: give either 'simulated' or"
                    " the real instruments (generator, scope, optional switch)")
        else:
            for role in ("generator", "scope"):
                if getattr(self, role) is None:
                    raise ValueError(
                        f"the bench needs a {role!r} (resource and optional driver),"
                        " or a 'simulated' entry in place of real instruments")
        return self

    @property
    def source(self) -> YamlSource | None:
        """The file this bench was read from, with its line map (None if built in code)."""
        return self._source

    @property
    def simulated_dut(self) -> str | None:
        """The simulated DUT: a model name as given, or a DUT file resolved against the
        bench file's folder (a name ending in .yaml/.yml). None for a real bench."""
        if self.simulated is None:
            return None
        dut = self.simulated.dut
        if dut.lower().endswith((".yaml", ".yml")) and self._source is not None:
            base = Path(self._source.path).parent
            candidate = Path(dut) if Path(dut).is_absolute() else base / dut
            return str(candidate)
        return dut

    @property
    def has_switch(self) -> bool:
        """True if a switch can close the loop or join the probes (a real switch or the
        simulated relay box)."""
        return self.switch is not None or self.simulated is not None


# --------------------------------------------------------------------------- limits


class Limit(_Model):
    """A pass/fail limit on one loop figure."""

    name: NameText
    figure: Figure
    min: Number | None = None
    max: Number | None = None
    unit: Annotated[str, AfterValidator(lambda v: _check_text(
        v, multiline=False, limit=20) if v else v)] | None = None

    @field_validator("max")
    @classmethod
    def _ordered(cls, value: float | None, info: ValidationInfo) -> float | None:
        low = info.data.get("min")
        if value is not None and low is not None and value < low:
            raise ValueError(f"max must not be below min ({low})")
        return value

    @model_validator(mode="after")
    def _one_bound(self) -> Limit:
        if self.min is None and self.max is None:
            raise ValueError("a limit needs min, max or both")
        return self

    @property
    def display_unit(self) -> str:
        """The unit given, or the figure's own unit."""
        return self.unit if self.unit is not None else FIGURES[self.figure]

    def evaluate(self, value: float | None) -> dict[str, Any]:
        """This limit against a value: the ``limits`` entry of summary.json.

        ``passed`` is False when the value is missing (a figure that was not reached
        fails its limit); ``margin`` is the distance to the nearer bound, positive
        inside, None without a value.
        """
        passed = False
        margin: float | None = None
        if value is not None and math.isfinite(value):
            distances = []
            if self.min is not None:
                distances.append(value - self.min)
            if self.max is not None:
                distances.append(self.max - value)
            margin = float(min(distances))
            passed = margin >= 0
        return {"name": self.name, "figure": self.figure, "min": self.min, "max": self.max,
                "unit": self.display_unit, "value": value, "passed": passed,
                "margin": margin}


_FROM_ANALYSIS = {
    "phase_margin_deg": "phase_margin_deg",
    "gain_margin_db": "gain_margin_db",
    "crossover_frequency_hz": "phase_margin_frequency_hz",
    "gain_margin_frequency_hz": "gain_margin_frequency_hz",
    "oscillation_frequency_hz": "oscillation_frequency_hz",
    "excess_gain": "excess_gain",
    "bandwidth_hz": "bandwidth_hz",
}
_FROM_RESONANCE = {"resonance_frequency_hz": "frequency_hz", "resonance_peak_db": "peak_db",
                   "resonance_q": "q"}
_FROM_CLOSED_LOOP = {"closed_loop_frequency_hz": "frequency_hz",
                     "closed_loop_amplitude_v": "amplitude_v",
                     "closed_loop_thd_pct": "thd_pct",
                     "closed_loop_frequency_error_pct": "frequency_error_pct"}


def figure_value(figure: str, analysis: dict[str, Any] | None,
                 closed_loop: dict[str, Any] | None = None) -> float | None:
    """The value of one figure of :data:`FIGURES` from a run's results, or None.

    Parameters
    ----------
    figure
        A key of :data:`FIGURES`.
    analysis
        ``LoopFigures.to_dict()``; ``crossover_frequency_hz`` is its
        ``phase_margin_frequency_hz`` (the worst crossover), ``resonance_*`` the
        highest peak of ``resonances``.
    closed_loop
        The ``closed_loop`` part of summary.json (``frequency_hz``, ``amplitude_v``,
        ``thd_pct``, ``frequency_error_pct``).
    """
    if figure not in FIGURES:
        raise InputError(f"unknown figure {figure!r}; one of {', '.join(FIGURES)}")
    value: Any = None
    if figure in _FROM_ANALYSIS and analysis:
        value = analysis.get(_FROM_ANALYSIS[figure])
    elif figure in _FROM_RESONANCE and analysis and analysis.get("resonances"):
        peak = max(analysis["resonances"], key=lambda r: r.get("peak_db", -math.inf))
        value = peak.get(_FROM_RESONANCE[figure])
    elif figure in _FROM_CLOSED_LOOP and closed_loop:
        value = closed_loop.get(_FROM_CLOSED_LOOP[figure])
    if value is None or isinstance(value, bool):
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def evaluate_limits(limits: list[Limit], analysis: dict[str, Any] | None,
                    closed_loop: dict[str, Any] | None = None
                    ) -> tuple[list[dict[str, Any]], str]:
    """Every limit against the results: (summary ``limits`` entries, verdict).

    The verdict is ``"pass"`` when every limit passed, ``"fail"`` when one did not,
    ``"none"`` without limits.
    """
    entries = [limit.evaluate(figure_value(limit.figure, analysis, closed_loop))
               for limit in limits]
    if not entries:
        return entries, "none"
    return entries, "pass" if all(e["passed"] for e in entries) else "fail"


# --------------------------------------------------------------------------- steps


class AmplitudePoint(_Model):
    """One corner of a piecewise amplitude profile."""

    frequency_hz: FrequencyHz
    amplitude_vpp: PositiveNumber


class RefineSettings(_Model):
    """Adaptive refinement: extra points where the response changes fast or crosses."""

    max_extra_points: Annotated[Count, Field(ge=0, le=MAX_EXTRA_POINTS)] = 20
    max_phase_step_deg: Annotated[float, BeforeValidator(_no_bool),
                                  Field(gt=0, le=180, allow_inf_nan=False)] = 10.0
    max_gain_step_db: Annotated[float, BeforeValidator(_no_bool),
                                Field(gt=0, le=200, allow_inf_nan=False)] = 2.0
    near_crossings: bool = True
    min_relative_spacing: Annotated[float, BeforeValidator(_no_bool),
                                    Field(gt=0, le=1, allow_inf_nan=False)] = 0.002


class _PlanKeys(_Model):
    """Keys shared by a sweep and a channel calibration: plan, amplitude, record."""

    label: NameText | None = None
    spacing: Literal["log", "linear"] = "log"
    start_hz: FrequencyHz | None = None
    stop_hz: FrequencyHz | None = None
    points_per_decade: Annotated[float, BeforeValidator(_no_bool),
                                 Field(gt=0, le=10_000, allow_inf_nan=False)] | None = None
    count: Annotated[Count, Field(ge=1, le=MAX_PLANNED_POINTS)] | None = None
    step_hz: FrequencyHz | None = None
    frequencies_hz: Annotated[list[FrequencyHz],
                              Field(min_length=1, max_length=MAX_PLANNED_POINTS)] | None = None
    amplitude_vpp: PositiveNumber | None = None
    amplitude_profile: Annotated[list[AmplitudePoint],
                                 Field(min_length=1, max_length=1000)] | None = None
    settle_s: Annotated[float, BeforeValidator(_no_bool),
                        Field(ge=0, le=3600, allow_inf_nan=False)] = 0.0
    settle_cycles: Annotated[float, BeforeValidator(_no_bool),
                             Field(ge=0, le=1e6, allow_inf_nan=False)] = 3.0
    cycles_per_record: Annotated[float, BeforeValidator(_no_bool),
                                 Field(ge=1, le=1e6, allow_inf_nan=False)] = 10.0
    min_samples: Annotated[Count, Field(ge=16, le=100_000_000)] = 2048
    averages: Annotated[Count, Field(ge=1, le=10_000)] = 1
    until_phase_std_deg: Annotated[float, BeforeValidator(_no_bool),
                                   Field(gt=0, le=90, allow_inf_nan=False)] | None = None
    max_averages: Annotated[Count, Field(ge=1, le=10_000)] | None = None
    autorange: bool = True
    estimator: Literal["sinefit", "dft", "xcorr"] = "sinefit"

    # -- cross-field checks, each on the later field so the error names its line
    @field_validator("stop_hz")
    @classmethod
    def _stop_above_start(cls, value: float | None, info: ValidationInfo) -> float | None:
        start = info.data.get("start_hz")
        if value is not None and start is not None and value <= start:
            raise ValueError(f"stop_hz must be above start_hz ({start:g} Hz)")
        return value

    @field_validator("points_per_decade")
    @classmethod
    def _ppd_log_only(cls, value: float | None, info: ValidationInfo) -> float | None:
        if value is not None and info.data.get("spacing") == "linear":
            raise ValueError("points_per_decade applies to spacing: log;"
                             " for linear spacing give count or step_hz")
        return value

    @field_validator("count")
    @classmethod
    def _count_alone(cls, value: int | None, info: ValidationInfo) -> int | None:
        if value is not None and info.data.get("points_per_decade") is not None:
            raise ValueError("give points_per_decade or count, not both")
        return value

    @field_validator("step_hz")
    @classmethod
    def _step_linear_only(cls, value: float | None, info: ValidationInfo) -> float | None:
        if value is None:
            return value
        if info.data.get("spacing") != "linear":
            raise ValueError("step_hz applies to spacing: linear"
                             " (for log spacing give points_per_decade or count)")
        if info.data.get("count") is not None:
            raise ValueError("give count or step_hz, not both")
        return value

    @field_validator("frequencies_hz")
    @classmethod
    def _explicit_list(cls, value: list[float] | None,
                       info: ValidationInfo) -> list[float] | None:
        if value is None:
            return value
        for key in ("start_hz", "stop_hz", "points_per_decade", "count", "step_hz"):
            if info.data.get(key) is not None:
                raise ValueError(f"an explicit frequencies_hz list replaces {key};"
                                 " give one or the other")
        seen: dict[float, int] = {}
        for index, frequency in enumerate(value):
            if frequency in seen:
                raise ValueError(f"duplicate frequency {frequency:g} Hz"
                                 f" (items {seen[frequency]} and {index})")
            seen[frequency] = index
        return value

    @field_validator("amplitude_profile")
    @classmethod
    def _profile(cls, value: list[AmplitudePoint] | None,
                 info: ValidationInfo) -> list[AmplitudePoint] | None:
        if value is None:
            return value
        if info.data.get("amplitude_vpp") is not None:
            raise ValueError("give amplitude_vpp (constant) or amplitude_profile, not both")
        for index in range(1, len(value)):
            if value[index].frequency_hz <= value[index - 1].frequency_hz:
                raise ValueError(
                    f"profile frequencies must increase (item {index},"
                    f" {value[index].frequency_hz:g} Hz, is not above item {index - 1})")
        return value

    @field_validator("max_averages")
    @classmethod
    def _max_averages(cls, value: int | None, info: ValidationInfo) -> int | None:
        if value is None:
            return value
        low = info.data.get("averages", 1)
        if value < low:
            raise ValueError(f"max_averages must not be below averages ({low})")
        return value

    @model_validator(mode="after")
    def _plan_complete(self) -> _PlanKeys:
        if self.has_own_plan:
            _check_plan_complete(self)
        if self.until_phase_std_deg is not None and self.max_averages is None:
            raise ValueError("until_phase_std_deg needs max_averages (the cap on averaging)")
        if self.until_phase_std_deg is None and self.max_averages is not None:
            raise ValueError("max_averages applies with until_phase_std_deg;"
                             " for a fixed count give averages alone")
        return self

    @property
    def has_own_plan(self) -> bool:
        """True if any frequency-plan key is given."""
        return any(getattr(self, key) is not None for key in
                   ("start_hz", "stop_hz", "points_per_decade", "count", "step_hz",
                    "frequencies_hz"))

    @property
    def has_amplitude(self) -> bool:
        """True if amplitude_vpp or amplitude_profile is given."""
        return self.amplitude_vpp is not None or self.amplitude_profile is not None

    def planned_count(self) -> int:
        """Points of the plan before refinement (0 without a plan of its own)."""
        return planned_count(self)


def _check_plan_complete(keys: _PlanKeys) -> None:
    if keys.frequencies_hz is not None:
        return
    if keys.start_hz is None or keys.stop_hz is None:
        raise ValueError("a frequency plan needs start_hz and stop_hz"
                         " (or an explicit frequencies_hz list)")
    if keys.spacing == "log" and keys.points_per_decade is None and keys.count is None:
        raise ValueError("a log plan needs points_per_decade or count")
    if keys.spacing == "linear" and keys.count is None and keys.step_hz is None:
        raise ValueError("a linear plan needs count or step_hz")
    if keys.planned_count() > MAX_PLANNED_POINTS:
        raise ValueError(f"the plan would hold {keys.planned_count()} points;"
                         f" at most {MAX_PLANNED_POINTS} are allowed")


class SweepStep(_PlanKeys):
    """An open-loop gain/phase sweep."""

    kind: Literal["sweep"]
    refine: RefineSettings | None = None
    keep_captures: bool = False
    flag_snr_below_db: Annotated[float, BeforeValidator(_no_bool),
                                 Field(ge=-50, le=200, allow_inf_nan=False)] = 20.0
    flag_thd_above_pct: Annotated[float, BeforeValidator(_no_bool),
                                  Field(gt=0, le=1000, allow_inf_nan=False)] = 5.0

    @model_validator(mode="after")
    def _needs_plan(self) -> SweepStep:
        if not self.has_own_plan:
            raise ValueError("a sweep needs a frequency plan: start_hz and stop_hz with"
                             " points_per_decade or count, or frequencies_hz")
        if not self.has_amplitude:
            raise ValueError("a sweep needs amplitude_vpp or amplitude_profile")
        return self


class CalibrateStep(_PlanKeys):
    """Both probes on one node: the channel mismatch over frequency.

    Without plan keys (and without an amplitude) it takes them from the next sweep.
    ``switch: prompt`` (the default) leaves joining the probes to the operator (``text``
    is shown first); ``switch: relay`` joins them with the bench's switch and separates
    them again afterwards.
    """

    kind: Literal["calibrate_channels"]
    switch: Literal["relay", "prompt"] = Field(
        "prompt", description="who puts both probes on one node: the switch or the operator")
    text: LongText | None = Field(
        None, description="operator instruction shown first (probes on one node)")

    @model_validator(mode="after")
    def _text_for_prompt(self) -> CalibrateStep:
        if self.text is not None and self.switch != "prompt":
            raise ValueError("text applies to switch: prompt (the relay needs no operator)")
        return self


class ClosedLoopStep(_Model):
    """Close the loop, measure the free-running oscillation, open the loop again."""

    kind: Literal["closed_loop_check"]
    label: NameText | None = None
    switch: Literal["relay", "prompt"]
    settle_s: Annotated[float, BeforeValidator(_no_bool),
                        Field(ge=0, le=3600, allow_inf_nan=False)] = 0.5
    record_cycles: Annotated[float, BeforeValidator(_no_bool),
                             Field(ge=2, le=1e6, allow_inf_nan=False)] = 50.0
    frequency_tolerance_pct: Annotated[float, BeforeValidator(_no_bool),
                                       Field(gt=0, le=100, allow_inf_nan=False)] = 5.0
    expected_frequency_hz: FrequencyHz | None = Field(
        None, description="where to look when the open-loop sweep predicts none")
    close_text: LongText | None = None
    open_text: LongText | None = None

    @field_validator("close_text", "open_text")
    @classmethod
    def _prompt_only(cls, value: str | None, info: ValidationInfo) -> str | None:
        if value is not None and info.data.get("switch") != "prompt":
            raise ValueError(f"{info.field_name} applies to switch: prompt")
        return value


class PromptStep(_Model):
    """An operator instruction; Enter continues."""

    kind: Literal["prompt"]
    text: LongText


Step = Annotated[Union[SweepStep, CalibrateStep, ClosedLoopStep, PromptStep],  # noqa: UP007
                 Field(discriminator="kind")]


# --------------------------------------------------------------------------- procedure


class Procedure(_Model):
    """A procedure file: loop convention, method, limits and steps."""

    name: NameText
    description: LongText | None = None
    sign: Literal[1, -1] = 1
    method: Literal["broken_loop", "voltage_injection", "current_injection"]
    limits: Annotated[list[Limit], Field(max_length=200)] = []
    steps: Annotated[list[Step], Field(min_length=1, max_length=1000)]

    _source: YamlSource | None = PrivateAttr(None)
    _sha256: str | None = PrivateAttr(None)

    @field_validator("sign", mode="before")
    @classmethod
    def _sign_number(cls, value: Any) -> Any:
        return _no_bool(value)

    @model_validator(mode="after")
    def _steps_fit_together(self) -> Procedure:
        # Messages start with the item's path; the loader moves them to its line.
        for index, step in enumerate(self.steps):
            if not isinstance(step, CalibrateStep) or self.next_sweep(index) is not None:
                continue
            if not step.has_own_plan:
                raise ValueError(
                    f"steps[{index}]: a calibrate_channels step without a frequency plan"
                    " takes the next sweep's, but no sweep follows; give start_hz/stop_hz"
                    " or frequencies_hz")
            if not step.has_amplitude:
                raise ValueError(
                    f"steps[{index}]: a calibrate_channels step without an amplitude takes"
                    " the next sweep's, but no sweep follows; give amplitude_vpp")
        has_closed_loop = any(isinstance(s, ClosedLoopStep) for s in self.steps)
        for index, limit in enumerate(self.limits):
            if limit.figure.startswith("closed_loop_") and not has_closed_loop:
                raise ValueError(
                    f"limits[{index}].figure: {limit.figure} is measured by a"
                    " closed_loop_check step, and this procedure has none")
        return self

    @property
    def source(self) -> YamlSource | None:
        """The file this procedure was read from, with its line map (None if built in code)."""
        return self._source

    @property
    def sha256(self) -> str | None:
        """SHA-256 of the file's bytes, for the manifest (None if built in code)."""
        return self._sha256

    def next_sweep(self, index: int) -> SweepStep | None:
        """The first sweep step after ``steps[index]``, or None."""
        for step in self.steps[index + 1:]:
            if isinstance(step, SweepStep):
                return step
        return None

    def calibration_plan(self, index: int) -> CalibrateStep:
        """The calibrate step at ``index`` with every missing plan key filled in.

        A calibration without plan keys takes the frequency plan of the next sweep; one
        without an amplitude takes the next sweep's amplitude (profile). Settling,
        record and averaging keys given on the calibrate step are kept.

        Raises
        ------
        InputError
            ``steps[index]`` is not a calibrate_channels step.
        """
        step = self.steps[index]
        if not isinstance(step, CalibrateStep):
            raise InputError(f"steps[{index}] is a {step.kind} step, not calibrate_channels")
        sweep = self.next_sweep(index)
        if sweep is None or (step.has_own_plan and step.has_amplitude):
            return step
        update: dict[str, Any] = {}
        given = step.model_fields_set
        if not step.has_own_plan:
            for key in ("spacing", "start_hz", "stop_hz", "points_per_decade", "count",
                        "step_hz", "frequencies_hz"):
                update[key] = getattr(sweep, key)
        if not step.has_amplitude:
            update["amplitude_vpp"] = sweep.amplitude_vpp
            update["amplitude_profile"] = sweep.amplitude_profile
        for key in ("settle_s", "settle_cycles", "cycles_per_record", "min_samples",
                    "averages", "until_phase_std_deg", "max_averages", "autorange",
                    "estimator"):
            if key not in given:
                update[key] = getattr(sweep, key)
        return step.model_copy(update=update)

    def sweep_indices(self) -> list[int]:
        """Indices of the sweep steps (the ``step`` column of points.csv)."""
        return [i for i, step in enumerate(self.steps) if isinstance(step, SweepStep)]

    def record(self) -> dict[str, Any]:
        """The procedure as plain JSON data, for the run manifest."""
        return self.model_dump(mode="json")


# --------------------------------------------------------------------------- loading


STEP_MODELS: dict[str, type[BaseModel]] = {
    "sweep": SweepStep,
    "calibrate_channels": CalibrateStep,
    "closed_loop_check": ClosedLoopStep,
    "prompt": PromptStep,
}


def _model_at(root: type[BaseModel], data: Any, loc: FieldPath) -> type[BaseModel] | None:
    """The model of the mapping that holds ``loc[-1]``, steps resolved by their kind."""
    model: type[BaseModel] | None = root
    probe = data
    for part in loc[:-1]:
        if isinstance(part, int):
            probe = probe[part] if isinstance(probe, list) and part < len(probe) else None
            if model is Procedure and isinstance(probe, dict) and "kind" in probe:
                model = STEP_MODELS.get(str(probe["kind"]))
            continue
        if model is None:
            return None
        info = model.model_fields.get(str(part))
        probe = probe.get(part) if isinstance(probe, dict) else None
        if info is None:
            return None
        if str(part) == "steps":
            continue  # items resolved by kind above
        model = next((t for t in _inner_models(info.annotation)), None)
    return model


def _inner_models(annotation: Any) -> list[type[BaseModel]]:
    out: list[type[BaseModel]] = []
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    for arg in typing.get_args(annotation):
        out.extend(_inner_models(arg))
    return out


def _field_loc(field: str | None) -> FieldPath:
    if not field:
        return ()
    loc: list[str | int] = []
    for name, index in re.findall(r"([^.\[\]]+)|\[(\d+)\]", field):
        loc.append(int(index) if index else name)
    return tuple(loc)


def _improve(error: InputError, root: type[BaseModel], source: YamlSource) -> InputError:
    """Sharpen yamlfile's messages: keys of the step's own kind; "did you mean" for values."""
    message = error.message
    loc = _field_loc(error.field)
    located = re.match(r"^((?:steps|limits)\[\d+\](?:\.\w+)?): (.*)$", message)
    if not loc and located is not None:
        # A whole-file check that names the item it is about: point at that item.
        item = _field_loc(located.group(1))
        moved = source.error(item, located.group(2))
        moved.__cause__ = error.__cause__
        return moved
    if message.startswith("unknown key") and loc:
        model = _model_at(root, source.data, loc)
        if model is not None:
            allowed = sorted(model.model_fields)
            guess = difflib.get_close_matches(str(loc[-1]), allowed, n=1)
            hint = f"; did you mean {guess[0]!r}?" if guess else ""
            more = re.search(r" \(and \d+ more problems?\)$", message)
            message = f"unknown key{hint or '.'} Allowed keys: {', '.join(allowed)}."
            if more:
                message += more.group(0)
    else:
        match = re.match(r"Input should be (.*?)(?: \(got (.*?)\))?( \(and .*)?$", message)
        if match is not None:
            allowed = re.findall(r"'([^']*)'", match.group(1))
            got = match.group(2)
            if allowed:
                given = (got or "").strip("'\"")
                guess = difflib.get_close_matches(given, allowed, n=1, cutoff=0.5)
                hint = f"; did you mean {guess[0]!r}?" if guess else ""
                message = f"must be one of {', '.join(allowed)}{hint}"
            else:
                message = f"must be {match.group(1)}"
            if got is not None:
                message += f" (got {got})"
            message += match.group(3) or ""
    if message == error.message:
        return error
    return InputError(message, path=error.path, line=error.line, field=error.field)


def _check_kinds(source: YamlSource) -> None:
    """Check each step's ``kind`` first, so the error points at that key's line."""
    data = source.data
    if not isinstance(data, dict) or not isinstance(data.get("steps"), list):
        return
    for index, step in enumerate(data["steps"]):
        if not isinstance(step, dict):
            raise source.error(("steps", index),
                               "a step is a mapping with a 'kind' key, one of "
                               + ", ".join(STEP_KINDS))
        if "kind" not in step:
            raise source.error(("steps", index),
                               "kind: required field is missing; one of "
                               + ", ".join(STEP_KINDS))
        kind = step["kind"]
        if kind not in STEP_KINDS:
            guess = difflib.get_close_matches(str(kind), STEP_KINDS, n=1, cutoff=0.5)
            hint = f"; did you mean {guess[0]!r}?" if guess else ""
            raise source.error(("steps", index, "kind"),
                               f"unknown step kind {kind!r}{hint} Allowed: "
                               + ", ".join(STEP_KINDS))


def _validate(model: type[Any], source: YamlSource) -> Any:
    try:
        return validate(model, source)
    except InputError as exc:
        raise _improve(exc, model, source) from exc.__cause__


def loads_bench(text: str, path: str = "<string>") -> Bench:
    """Read a bench file from text; see :func:`load_bench`."""
    return _bench_from(loads_yaml(text, path))


def load_bench(path: str | Path) -> Bench:
    """Read and validate a bench file.

    Raises
    ------
    InputError
        Naming file, line and field.
    """
    return _bench_from(load_yaml(path))


def _bench_from(source: YamlSource) -> Bench:
    if not isinstance(source.data, dict):
        raise source.error((), "a bench file is a mapping (generator, scope, caps...)")
    bench = _validate(Bench, source)
    bench._source = source
    _check_simulated_dut(bench, source)
    return bench


def _check_simulated_dut(bench: Bench, source: YamlSource) -> None:
    """A simulated bench's DUT must exist (and its file be valid) before a run starts."""
    if bench.simulated is None:
        return
    from mock_instruments.duts import DUTS, load_dut

    dut = bench.simulated.dut
    if not dut.lower().endswith((".yaml", ".yml")):
        if dut not in DUTS:
            guess = difflib.get_close_matches(dut, list(DUTS), n=1)
            hint = f"; did you mean {guess[0]!r}?" if guess else ""
            raise source.error(("simulated", "dut"), f"unknown DUT model {dut!r}{hint or '.'}"
                               f" Known: {', '.join(sorted(DUTS))}, or a DUT .yaml file")
        return
    path = Path(bench.simulated_dut or dut)
    if not path.is_file():
        raise source.error(("simulated", "dut"), f"no DUT file at {str(path)!r}"
                           " (a relative path is read from the bench file's folder)")
    load_dut(path)  # its own errors name the DUT file, line and field


def loads_procedure(text: str, path: str = "<string>") -> Procedure:
    """Read a procedure from text; see :func:`load_procedure`."""
    procedure = _procedure_from(loads_yaml(text, path))
    procedure._sha256 = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return procedure


def load_procedure(path: str | Path) -> Procedure:
    """Read and validate a procedure file.

    Returns
    -------
    Procedure
        With ``.source`` (line map) and ``.sha256`` of the file's bytes.

    Raises
    ------
    InputError
        Naming file, line and field, the allowed values and a near match.
    """
    procedure = _procedure_from(load_yaml(path))
    procedure._sha256 = hashlib.sha256(Path(path).read_bytes()).hexdigest()
    return procedure


def _procedure_from(source: YamlSource) -> Procedure:
    if not isinstance(source.data, dict):
        raise source.error((), "a procedure file is a mapping (name, method, steps...)")
    _check_kinds(source)
    procedure = _validate(Procedure, source)
    procedure._source = source
    return procedure


# --------------------------------------------------------------------------- safety


def _where(model: Procedure | Bench, loc: FieldPath) -> str:
    source = model.source
    if source is None:
        return f"<{type(model).__name__.lower()}>: {format_loc(loc)}"
    line = source.line_of(loc)
    at = f"{source.path}:{line}" if line is not None else source.path
    return f"{at}: {format_loc(loc)}"


def check_against_bench(procedure: Procedure, bench: Bench) -> None:
    """Refuse a procedure that would exceed a cap of the bench, before anything runs.

    Every sweep and channel calibration is checked: the highest planned frequency
    against ``max_frequency_hz`` (refinement only adds points between planned ones)
    and the largest amplitude (constant or any profile corner) against
    ``max_amplitude_vpp``.

    Raises
    ------
    SafetyError
        Naming the procedure file, line and field, the value and the cap.
    InputError
        A closed_loop_check or calibrate_channels step with ``switch: relay`` on a bench
        without a switch.
    """
    for index, step in enumerate(procedure.steps):
        if isinstance(step, CalibrateStep) and step.switch == "relay" and not bench.has_switch:
            raise InputError(
                f"{_where(procedure, ('steps', index, 'switch'))}: switch: relay needs a"
                " 'switch' instrument in the bench file (a relay that joins the probes);"
                " use switch: prompt otherwise")
        if isinstance(step, ClosedLoopStep):
            if step.switch == "relay" and not bench.has_switch:
                raise InputError(
                    f"{_where(procedure, ('steps', index, 'switch'))}: switch: relay needs"
                    " a 'switch' instrument in the bench file; use switch: prompt otherwise")
            if (step.expected_frequency_hz is not None
                    and step.expected_frequency_hz > bench.max_frequency_hz):
                raise SafetyError(
                    f"{_where(procedure, ('steps', index, 'expected_frequency_hz'))}:"
                    f" {step.expected_frequency_hz:g} Hz is above the bench cap"
                    f" max_frequency_hz = {bench.max_frequency_hz:g} Hz")
            continue
        if isinstance(step, CalibrateStep):
            plan_step: _PlanKeys = procedure.calibration_plan(index)
        elif isinstance(step, SweepStep):
            plan_step = step
        else:
            continue
        frequencies = frequency_plan(plan_step)
        if frequencies.size and float(frequencies[-1]) > bench.max_frequency_hz:
            key = "frequencies_hz" if plan_step.frequencies_hz is not None else "stop_hz"
            if not step.has_own_plan:
                key = "kind"
            raise SafetyError(
                f"{_where(procedure, ('steps', index, key))}: the plan reaches"
                f" {float(frequencies[-1]):g} Hz, above the bench cap"
                f" max_frequency_hz = {bench.max_frequency_hz:g} Hz; nothing was sent")
        if plan_step.amplitude_profile is not None:
            for corner, point in enumerate(plan_step.amplitude_profile):
                if point.amplitude_vpp > bench.max_amplitude_vpp:
                    loc: FieldPath = ("steps", index, "amplitude_profile", corner,
                                      "amplitude_vpp")
                    if step.amplitude_profile is None:
                        loc = ("steps", index, "kind")
                    raise SafetyError(
                        f"{_where(procedure, loc)}: {point.amplitude_vpp:g} Vpp is above"
                        f" the bench cap max_amplitude_vpp = {bench.max_amplitude_vpp:g} Vpp;"
                        " nothing was sent")
        elif plan_step.amplitude_vpp is not None and (
                plan_step.amplitude_vpp > bench.max_amplitude_vpp):
            loc = ("steps", index, "amplitude_vpp" if step.has_amplitude else "kind")
            raise SafetyError(
                f"{_where(procedure, loc)}: {plan_step.amplitude_vpp:g} Vpp is above the"
                f" bench cap max_amplitude_vpp = {bench.max_amplitude_vpp:g} Vpp;"
                " nothing was sent")
