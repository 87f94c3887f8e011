"""The schema of driver files (``drivers/*.yaml``): pydantic models, extra keys forbidden.

A driver file describes one command dialect for one role (generator, scope or
switch): how to recognise the instrument from its ``*IDN?``, the command templates of
each operation, the limits and number formats of every value a template sends, the
fixed words of each enumeration, the waveform format of a scope and the init and
teardown sequences. ``drivers/example-commented.yaml`` explains every key.

Templates hold ``{name}`` placeholders and nothing else: no format specs, no
conversions, no attribute or index access. Each operation allows a fixed set of
names; at run time each is replaced by a number formatted by its ``values`` entry
(after its limits are checked), a word of a fixed set, or a channel number from
``channels``. No free string from a procedure can reach an instrument.
"""

from __future__ import annotations

import re
import string
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, BeforeValidator, ConfigDict, Field, model_validator

#: Placeholders each operation's templates may use.
GENERATOR_FIELDS = {
    "select_sine": frozenset(),
    "set_frequency": frozenset({"frequency_hz"}),
    "set_amplitude": frozenset({"amplitude_vpp"}),
    "set_offset": frozenset({"offset_v"}),
    "set_output": frozenset({"output"}),
}
SCOPE_FIELDS = {
    "set_channel": frozenset({"channel", "volts_per_div", "full_range_v", "offset_v",
                              "coupling", "probe_ratio"}),
    "set_timebase": frozenset({"points", "sample_rate_hz"}),
    "set_trigger": frozenset({"channel", "level_v", "slope"}),
}
#: Word sets and the role values each maps to an instrument word.
WORD_SETS: dict[str, tuple[str, ...]] = {
    "output": ("on", "off"),
    "coupling": ("AC", "DC"),
    "slope": ("rise", "fall"),
}
#: Placeholders that are not numbers checked by ``values``.
NON_NUMERIC = frozenset({"channel", *WORD_SETS})

_WORD = re.compile(r"^[A-Za-z0-9_.+-]+$")
_FORMAT = re.compile(r"^(\.\d{1,2})?[eEfgG]$|^d$")
_NAME = re.compile(r"^[a-z0-9][a-z0-9-]*$")
_CONTROL = re.compile(r"[\x00-\x1f\x7f]")


def template_fields(template: str) -> list[str]:
    """The placeholder names of ``template``.

    Raises
    ------
    ValueError
        A placeholder with a format spec, conversion, attribute or index, or a
        control character in the template.
    """
    if _CONTROL.search(template):
        raise ValueError("a command must not contain control characters (newline, tab...)")
    names = []
    try:
        parsed = list(string.Formatter().parse(template))
    except ValueError as exc:
        raise ValueError(f"bad placeholder: {exc}; write literal braces as {{{{ and }}}}"
                         ) from exc
    for _literal, name, spec, conversion in parsed:
        if name is None:
            continue
        if not name.isidentifier():
            raise ValueError(f"placeholder {{{name}}} must be a plain name")
        if spec or conversion:
            raise ValueError(f"placeholder {{{name}}} must not carry a format or conversion;"
                             " the number format is set under 'values'")
        names.append(name)
    return names


def _constant(template: str) -> str:
    if template_fields(template):
        raise ValueError("this command takes no placeholders")
    if not template.strip():
        raise ValueError("empty command")
    return template


def _allowing(allowed: frozenset[str]):
    def check(template: str) -> str:
        if not template.strip():
            raise ValueError("empty command")
        bad = [n for n in template_fields(template) if n not in allowed]
        if bad:
            listing = ", ".join(sorted(allowed)) or "none"
            raise ValueError(f"placeholder {{{bad[0]}}} is not allowed here; allowed: {listing}")
        return template
    return check


def _as_list(value: Any) -> Any:
    return [value] if isinstance(value, str) else value


def _word_text(value: Any) -> Any:
    """Accept YAML integers as words; refuse the booleans unquoted on/off/yes/no give."""
    if isinstance(value, bool):
        raise ValueError("YAML reads unquoted on/off/yes/no/true/false as a boolean;"
                         " quote the word")
    if isinstance(value, int):
        return str(value)
    return value


def _word(value: str) -> str:
    if not _WORD.match(value):
        raise ValueError("a word may hold only letters, digits and _ . + -")
    return value


Word = Annotated[str, BeforeValidator(_word_text), AfterValidator(_word)]
Constant = Annotated[str, AfterValidator(_constant)]
ConstantList = Annotated[list[Constant], BeforeValidator(_as_list)]


def _commands(allowed: frozenset[str]) -> Any:
    return Annotated[list[Annotated[str, AfterValidator(_allowing(allowed))]],
                     BeforeValidator(_as_list), Field(min_length=1)]


def _query(allowed: frozenset[str] = frozenset()) -> Any:
    return Annotated[str, AfterValidator(_allowing(allowed))]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class NumberSpec(_Strict):
    """Limits and format of one number a template sends."""

    min: float | None = None
    max: float | None = None
    format: str = Field(".10g", description="Python format spec: .10g, .6e, d ...")
    integer: bool = False
    times_probe_ratio: bool = Field(
        False, description="scope channel values: min and max are multiplied by the probe"
        " ratio (limits hold at the scope input, values are at the probe tip)")

    @model_validator(mode="after")
    def _check(self) -> NumberSpec:
        if not _FORMAT.match(self.format):
            raise ValueError(f"format {self.format!r} must be like .10g, .6e, .3f, g or d")
        if self.min is not None and self.max is not None and self.min > self.max:
            raise ValueError(f"min {self.min:g} is above max {self.max:g}")
        if self.format == "d" and not self.integer:
            raise ValueError("format 'd' needs 'integer: true'")
        return self


class MatchRule(_Strict):
    """How to recognise the instrument: a regular expression searched in ``*IDN?``."""

    idn: str

    @model_validator(mode="after")
    def _compiles(self) -> MatchRule:
        try:
            re.compile(self.idn)
        except re.error as exc:
            raise ValueError(f"idn is not a valid regular expression: {exc}") from exc
        return self

    def matches(self, identity: str) -> bool:
        """True when the regular expression is found in ``identity``."""
        return re.search(self.idn, identity) is not None


class StateQuery(_Strict):
    """A query whose reply is one of two word lists (e.g. output on/off)."""

    query: _query()
    true_replies: list[Word] = Field(min_length=1)
    false_replies: list[Word] = Field(min_length=1)


class DriverBase(_Strict):
    """Keys common to every role."""

    name: str = Field(description="the dialect name, lowercase words joined by '-'")
    dialect: str
    description: str = ""
    match: MatchRule
    error_query: _query() | None = None
    python: str | None = Field(
        None, description="module:Class or a registered name implementing the role")
    values: dict[str, NumberSpec] = Field(default_factory=dict)
    init: ConstantList = Field(default_factory=list)
    teardown: ConstantList = Field(default_factory=list)

    @model_validator(mode="after")
    def _base(self) -> DriverBase:
        if not _NAME.match(self.name):
            raise ValueError(f"name {self.name!r}: use lowercase letters, digits and '-'")
        if self.python is None:
            missing = [k for k in self._template_keys() if getattr(self, k) is None]
            if missing:
                raise ValueError(f"{missing[0]!r} is required unless 'python' names a"
                                 " driver class")
        return self

    def _template_keys(self) -> tuple[str, ...]:
        return ()


def _words_model(name: str, keys: tuple[str, ...], defaults: tuple[str, ...]) -> Any:
    return Annotated[dict[str, Word], BeforeValidator(_word_keys(name, keys))], dict(
        zip(keys, defaults, strict=True))


def _word_keys(name: str, keys: tuple[str, ...]):
    def check(value: Any) -> Any:
        if not isinstance(value, dict):
            return value
        got = {("on" if k == "True" else "off" if k == "False" else k) for k in value}
        if got != set(keys):
            raise ValueError(f"the {name} words need exactly the keys {', '.join(keys)}"
                             " (quote on/off)")
        return {("on" if k == "True" else "off" if k == "False" else k): v
                for k, v in value.items()}
    return check


_OutputWords, _OUTPUT_DEFAULT = _words_model("output", WORD_SETS["output"], ("ON", "OFF"))
_CouplingWords, _COUPLING_DEFAULT = _words_model("coupling", WORD_SETS["coupling"],
                                                 ("AC", "DC"))
_SlopeWords, _SLOPE_DEFAULT = _words_model("slope", WORD_SETS["slope"], ("RISE", "FALL"))


class GeneratorWords(_Strict):
    """Instrument words of the generator's fixed sets."""

    output: _OutputWords = Field(default_factory=lambda: dict(_OUTPUT_DEFAULT))


class GeneratorCommands(_Strict):
    """Command templates of a sine generator."""

    select_sine: _commands(GENERATOR_FIELDS["select_sine"])
    set_frequency: _commands(GENERATOR_FIELDS["set_frequency"])
    set_amplitude: _commands(GENERATOR_FIELDS["set_amplitude"])
    set_offset: _commands(GENERATOR_FIELDS["set_offset"])
    set_output: _commands(GENERATOR_FIELDS["set_output"])


class GeneratorReadback(_Strict):
    """Queries that read a generator's settings back."""

    frequency_hz: _query()
    amplitude_vpp: _query()
    offset_v: _query()
    output: StateQuery


class GeneratorDriver(DriverBase):
    """A sine generator dialect."""

    role: Literal["generator"]
    peak_v: float | None = Field(
        None, gt=0, description="|offset_v| + amplitude_vpp / 2 must not exceed this")
    words: GeneratorWords = Field(default_factory=GeneratorWords)
    commands: GeneratorCommands | None = None
    readback: GeneratorReadback | None = None

    def _template_keys(self) -> tuple[str, ...]:
        return ("commands", "readback")


class ScopeWords(_Strict):
    """Instrument words of the scope's fixed sets."""

    coupling: _CouplingWords = Field(default_factory=lambda: dict(_COUPLING_DEFAULT))
    slope: _SlopeWords = Field(default_factory=lambda: dict(_SLOPE_DEFAULT))


class ScopeCommands(_Strict):
    """Command templates of a scope."""

    set_channel: _commands(SCOPE_FIELDS["set_channel"])
    set_timebase: _commands(SCOPE_FIELDS["set_timebase"])
    set_trigger: _commands(SCOPE_FIELDS["set_trigger"])


class ScopeReadback(_Strict):
    """Queries that read a scope's settings back."""

    sample_rate_hz: _query()


class Acquisition(_Strict):
    """How one acquisition is started and how its completion is detected.

    ``complete: opc`` waits on ``*OPC?``; ``complete: poll`` repeats ``poll_query``
    every ``poll_interval_s`` until it answers ``done_reply``.
    """

    start: Annotated[list[Constant], BeforeValidator(_as_list), Field(min_length=1)]
    complete: Literal["opc", "poll"]
    poll_query: _query() | None = None
    done_reply: Word | None = None
    poll_interval_s: float = Field(0.005, gt=0, le=10)

    @model_validator(mode="after")
    def _poll(self) -> Acquisition:
        if self.complete == "poll" and (self.poll_query is None or self.done_reply is None):
            raise ValueError("complete: poll needs poll_query and done_reply")
        return self


class Preamble(_Strict):
    """Where a binary waveform's scaling sits in the preamble reply (0-based fields).

    Volts = (code - y_reference) * y_increment_v + y_origin_v;
    seconds per sample = x_increment_s.
    """

    query: _query()
    separator: str = ","
    points: int = Field(ge=0)
    x_increment_s: int = Field(ge=0)
    y_increment_v: int = Field(ge=0)
    y_origin_v: int = Field(ge=0)
    y_reference: int = Field(ge=0)


class Waveform(_Strict):
    """How a channel's record is read."""

    format: Literal["binary", "ascii"]
    select: Annotated[list[Annotated[str, AfterValidator(_allowing(frozenset({"channel"})))]],
                      BeforeValidator(_as_list)] = Field(default_factory=list)
    data_query: _query(frozenset({"channel"}))
    data_type: Literal["int8", "int16", "float32"] | None = None
    byte_order: Literal["little", "big"] | None = None
    preamble: Preamble | None = None
    x_increment_query: _query(frozenset({"channel"})) | None = None
    separator: str = ","

    @model_validator(mode="after")
    def _format(self) -> Waveform:
        if self.format == "binary":
            for key in ("data_type", "byte_order", "preamble"):
                if getattr(self, key) is None:
                    raise ValueError(f"format: binary needs {key!r}")
        elif self.x_increment_query is None:
            raise ValueError("format: ascii needs 'x_increment_query'")
        return self


class ScopeDriver(DriverBase):
    """A scope dialect."""

    role: Literal["scope"]
    channels: list[int] = Field(default_factory=lambda: [1, 2], min_length=1)
    words: ScopeWords = Field(default_factory=ScopeWords)
    commands: ScopeCommands | None = None
    readback: ScopeReadback | None = None
    acquisition: Acquisition | None = None
    waveform: Waveform | None = None

    def _template_keys(self) -> tuple[str, ...]:
        return ("commands", "readback", "acquisition", "waveform")


_SwitchCommand = Annotated[list[Constant], BeforeValidator(_as_list), Field(min_length=1)]


class SwitchCommands(_Strict):
    """Command templates of a loop switch (constants: no placeholders).

    ``join_probes`` / ``separate_probes`` are optional and go together: a switch that
    can also put channel 2's probe on channel 1's node (for a channel calibration).
    """

    close_loop: _SwitchCommand
    open_loop: _SwitchCommand
    join_probes: _SwitchCommand | None = None
    separate_probes: _SwitchCommand | None = None

    @model_validator(mode="after")
    def _probe_pair(self) -> SwitchCommands:
        if (self.join_probes is None) != (self.separate_probes is None):
            raise ValueError("join_probes and separate_probes go together; give both or"
                             " neither")
        return self


class SwitchReadback(_Strict):
    """Queries that read the switch state back."""

    closed: StateQuery
    probes_joined: StateQuery | None = None


class SwitchDriver(DriverBase):
    """A loop-switch dialect."""

    role: Literal["switch"]
    commands: SwitchCommands | None = None
    readback: SwitchReadback | None = None

    def _template_keys(self) -> tuple[str, ...]:
        return ("commands",)


DriverSpec = GeneratorDriver | ScopeDriver | SwitchDriver
#: The model of each role.
ROLE_MODELS: dict[str, type[DriverBase]] = {
    "generator": GeneratorDriver, "scope": ScopeDriver, "switch": SwitchDriver}


#: Values each role's drivers must limit with both min and max.
REQUIRED_LIMITS = {
    "generator": ("frequency_hz", "amplitude_vpp", "offset_v"),
    "scope": ("volts_per_div", "points", "sample_rate_hz"),
    "switch": (),
}
