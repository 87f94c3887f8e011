"""Procedure and bench files: validation errors name file, line and field; caps refused."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest

from loopwright.errors import InputError, SafetyError
from loopwright.procedure import (
    FIGURES,
    CalibrateStep,
    Limit,
    SweepStep,
    check_against_bench,
    evaluate_limits,
    figure_value,
    load_bench,
    load_procedure,
    loads_bench,
    loads_procedure,
)
from loopwright.procedure.schema import Figure
from loopwright.resources import data_dir

PROCEDURE = textwrap.dedent("""\
    name: test loop
    method: broken_loop
    sign: -1
    limits:
      - name: phase margin
        figure: phase_margin_deg
        min: 45
    steps:
      - kind: sweep
        start_hz: 100
        stop_hz: 1.0e5
        points_per_decade: 10
        amplitude_vpp: 0.5
      - kind: prompt
        text: Close the loop, then press Enter.
    """)
# line numbers of PROCEDURE:  1 name, 2 method, 3 sign, 4 limits, 5 - name, 6 figure,
# 7 min, 8 steps, 9 - kind: sweep, 10 start_hz, 11 stop_hz, 12 points_per_decade,
# 13 amplitude_vpp, 14 - kind: prompt, 15 text

BENCH = textwrap.dedent("""\
    generator:
      resource: "TCPIP::192.0.2.1::INSTR"
    scope:
      resource: "TCPIP::192.0.2.2::INSTR"
      driver: generic-scope
    channels:
      reference: 1
      response: 2
    max_amplitude_vpp: 1.0
    max_frequency_hz: 1.0e6
    """)


def _error(text: str, path: str = "proc.yaml") -> InputError:
    with pytest.raises(InputError) as info:
        loads_procedure(text, path)
    return info.value


def test_valid_procedure_reads():
    procedure = loads_procedure(PROCEDURE)
    assert procedure.sign == -1
    assert isinstance(procedure.steps[0], SweepStep)
    assert procedure.steps[0].stop_hz == 1e5
    assert procedure.sweep_indices() == [0]
    assert procedure.sha256 is not None and len(procedure.sha256) == 64
    assert procedure.record()["steps"][1]["kind"] == "prompt"


@pytest.mark.parametrize(("old", "new", "line", "field", "words"), [
    # unknown key with did-you-mean and the step's own allowed keys
    ("points_per_decade: 10", "points_per_decad: 10", 12, "steps[0].points_per_decad",
     ["did you mean 'points_per_decade'", "Allowed keys:", "start_hz"]),
    # unknown step kind, did-you-mean, allowed kinds
    ("kind: sweep", "kind: swep", 9, "steps[0].kind",
     ["did you mean 'sweep'", "calibrate_channels"]),
    # literal value with allowed values and did-you-mean
    ("figure: phase_margin_deg", "figure: phase_margin", 6, "limits[0].figure",
     ["did you mean 'phase_margin_deg'", "gain_margin_db"]),
    ("method: broken_loop", "method: brokenloop", 2, "method",
     ["did you mean 'broken_loop'", "voltage_injection"]),
    ("sign: -1", "sign: 2", 3, "sign", ["1 or -1"]),
    ("sign: -1", "sign: yes", 3, "sign", ["not true/false"]),
    # cross-field: stop not above start names the stop line
    ("stop_hz: 1.0e5", "stop_hz: 50", 11, "steps[0].stop_hz", ["above start_hz"]),
    ("stop_hz: 1.0e5", "stop_hz: .inf", 11, "steps[0].stop_hz", ["finite"]),
    ("stop_hz: 1.0e5", "stop_hz: .nan", 11, "steps[0].stop_hz", ["finite"]),
    ("start_hz: 100", "start_hz: -100", 10, "steps[0].start_hz", ["greater than 0"]),
    ("amplitude_vpp: 0.5", "amplitude_vpp: 0", 13, "steps[0].amplitude_vpp",
     ["greater than 0"]),
    # 10,000 points per decade over 11 decades: beyond the 100,000-point bound
    ("start_hz: 100\n    stop_hz: 1.0e5\n    points_per_decade: 10",
     "start_hz: 1.0e-6\n    stop_hz: 1.0e5\n    points_per_decade: 10000", 9, "steps[0]",
     ["110001 points", "at most 100000"]),
    ("name: test loop", 'name: "bell\\x07"', 1, "name", ["control"]),
    ("text: Close the loop, then press Enter.", "text: ''", 15, "steps[1].text",
     ["empty"]),
    ("min: 45", "min: 45\n    extra: 1", 8, "limits[0].extra", ["unknown key"]),
])
def test_errors_name_file_line_field(old, new, line, field, words):
    assert old in PROCEDURE
    error = _error(PROCEDURE.replace(old, new, 1))
    assert error.path == "proc.yaml"
    assert error.line == line, str(error)
    assert error.field == field, str(error)
    for word in words:
        assert word in error.message, str(error)
    assert str(error).startswith(f"proc.yaml:{line}: {field}: ")


def test_missing_required_field_names_it():
    error = _error(PROCEDURE.replace("method: broken_loop\n", ""))
    assert error.field == "method"
    assert "required" in error.message


def test_unknown_key_in_refine_lists_refine_keys():
    text = PROCEDURE.replace("amplitude_vpp: 0.5",
                             "amplitude_vpp: 0.5\n    refine:\n      max_extra: 3")
    error = _error(text)
    assert (error.line, error.field) == (15, "steps[0].refine.max_extra")
    assert "did you mean 'max_extra_points'" in error.message
    assert "near_crossings" in error.message and "start_hz" not in error.message


@pytest.mark.parametrize(("addition", "field", "words"), [
    ("    frequencies_hz: [1000, 2000]", "steps[0].frequencies_hz", ["replaces start_hz"]),
    ("    count: 20", "steps[0].count", ["not both"]),
    ("    step_hz: 10", "steps[0].step_hz", ["linear"]),
    ("    amplitude_profile: [{frequency_hz: 100, amplitude_vpp: 1}]",
     "steps[0].amplitude_profile", ["not both"]),
    ("    until_phase_std_deg: 0.5", "steps[0]", ["max_averages"]),
    ("    estimator: sinfit", "steps[0].estimator", ["did you mean 'sinefit'", "xcorr"]),
])
def test_conflicting_keys(addition, field, words):
    text = PROCEDURE.replace("amplitude_vpp: 0.5", "amplitude_vpp: 0.5\n" + addition)
    error = _error(text)
    assert error.field == field, str(error)
    for word in words:
        assert word in error.message, str(error)


def test_explicit_list_duplicates_refused():
    text = PROCEDURE.replace(
        "start_hz: 100\n    stop_hz: 1.0e5\n    points_per_decade: 10",
        "frequencies_hz:\n      - 1000\n      - 500\n      - 1000")
    error = _error(text)
    assert (error.line, error.field) == (10, "steps[0].frequencies_hz")
    assert "duplicate frequency 1000 Hz (items 0 and 2)" in error.message


def test_profile_must_increase():
    text = PROCEDURE.replace("amplitude_vpp: 0.5", textwrap.dedent("""\
        amplitude_profile:
              - {frequency_hz: 1000, amplitude_vpp: 0.5}
              - {frequency_hz: 100, amplitude_vpp: 0.2}"""))
    error = _error(text)
    assert error.field == "steps[0].amplitude_profile"
    assert "must increase" in error.message


def test_sweep_needs_plan_and_amplitude():
    error = _error(PROCEDURE.replace("    amplitude_vpp: 0.5\n", ""))
    assert error.field == "steps[0]" and error.line == 9
    assert "amplitude_vpp or amplitude_profile" in error.message


def test_calibration_borrows_next_sweep_plan():
    text = PROCEDURE.replace("steps:\n", "steps:\n  - kind: calibrate_channels\n"
                             "    averages: 4\n")
    procedure = loads_procedure(text)
    assert isinstance(procedure.steps[0], CalibrateStep)
    resolved = procedure.calibration_plan(0)
    assert resolved.start_hz == 100 and resolved.stop_hz == 1e5
    assert resolved.points_per_decade == 10 and resolved.amplitude_vpp == 0.5
    assert resolved.averages == 4          # its own key kept


def test_calibration_without_plan_needs_a_following_sweep():
    text = PROCEDURE + "  - kind: calibrate_channels\n"
    error = _error(text)
    assert (error.line, error.field) == (16, "steps[2]")
    assert "no sweep follows" in error.message
    text = PROCEDURE + "  - kind: calibrate_channels\n    count: 5\n    start_hz: 1\n" \
        "    stop_hz: 10\n"
    error = _error(text)
    assert (error.line, error.field) == (16, "steps[2]")
    assert "without an amplitude" in error.message


def test_closed_loop_limit_needs_closed_loop_step():
    text = PROCEDURE.replace("figure: phase_margin_deg", "figure: closed_loop_thd_pct")
    error = _error(text)
    assert (error.line, error.field) == (6, "limits[0].figure")
    assert "closed_loop_check" in error.message
    loads_procedure(text + "  - kind: closed_loop_check\n    switch: prompt\n")


def test_step_not_a_mapping():
    error = _error(PROCEDURE.replace("  - kind: prompt\n    text: Close the loop, then press"
                                     " Enter.\n", "  - just text\n"))
    assert (error.line, error.field) == (14, "steps[1]")


def test_bench_errors():
    with pytest.raises(InputError) as info:
        loads_bench(BENCH.replace("driver:", "drivr:"), "bench.yaml")
    assert (info.value.line, info.value.field) == (5, "scope.drivr")
    assert "did you mean 'driver'" in info.value.message
    with pytest.raises(InputError) as info:
        loads_bench(BENCH.replace("response: 2", "response: 1"), "bench.yaml")
    assert (info.value.line, info.value.field) == (8, "channels.response")
    with pytest.raises(InputError) as info:
        loads_bench(BENCH.replace("max_frequency_hz: 1.0e6\n", ""), "bench.yaml")
    assert info.value.field == "max_frequency_hz" and "required" in info.value.message
    with pytest.raises(InputError) as info:
        loads_bench(BENCH + "simulated: {dut: rational}\n", "bench.yaml")
    assert "either 'simulated' or the real instruments" in info.value.message
    with pytest.raises(InputError) as info:
        loads_bench("simulated: {dut: rational, noise_v_rms: -1}\nmax_amplitude_vpp: 1\n"
                    "max_frequency_hz: 1e6\n", "bench.yaml")
    assert (info.value.line, info.value.field) == (1, "simulated.noise_v_rms")


def test_simulated_bench_reads():
    bench = loads_bench("simulated: {dut: wien}\nmax_amplitude_vpp: 1\nmax_frequency_hz: 1e6\n")
    assert bench.simulated.dut == "wien" and bench.has_switch
    assert bench.backend == "@py"


def _with_bench_caps(amplitude: float, frequency: float):
    return loads_bench(BENCH.replace("max_amplitude_vpp: 1.0", f"max_amplitude_vpp: {amplitude}")
                       .replace("max_frequency_hz: 1.0e6", f"max_frequency_hz: {frequency}"),
                       "bench.yaml")


def test_caps_refused_with_file_line_field():
    procedure = loads_procedure(PROCEDURE, "proc.yaml")
    check_against_bench(procedure, _with_bench_caps(1.0, 1e6))  # within the caps
    with pytest.raises(SafetyError, match=r"^proc\.yaml:13: steps\[0\]\.amplitude_vpp: 0\.5 Vpp"
                       r" is above the bench cap max_amplitude_vpp = 0\.4"):
        check_against_bench(procedure, _with_bench_caps(0.4, 1e6))
    with pytest.raises(SafetyError, match=r"^proc\.yaml:11: steps\[0\]\.stop_hz: .*100000 Hz"
                       r".*max_frequency_hz = 50000"):
        check_against_bench(procedure, _with_bench_caps(1.0, 5e4))


def test_profile_corner_above_cap_refused():
    text = PROCEDURE.replace("amplitude_vpp: 0.5", textwrap.dedent("""\
        amplitude_profile:
              - {frequency_hz: 100, amplitude_vpp: 0.9}
              - {frequency_hz: 1000, amplitude_vpp: 0.2}"""))
    procedure = loads_procedure(text, "proc.yaml")
    with pytest.raises(SafetyError, match=r"proc\.yaml:14: steps\[0\]\.amplitude_profile\[0\]"):
        check_against_bench(procedure, _with_bench_caps(0.5, 1e6))


def test_relay_step_needs_a_switch():
    text = PROCEDURE + "  - kind: closed_loop_check\n    switch: relay\n"
    procedure = loads_procedure(text, "proc.yaml")
    with pytest.raises(InputError, match="needs a 'switch'"):
        check_against_bench(procedure, _with_bench_caps(1.0, 1e6))


def test_figures_table_matches_literal():
    import typing

    assert set(typing.get_args(Figure)) == set(FIGURES)


def test_limits_against_analysis_dict():
    analysis = {"phase_margin_deg": 52.0, "gain_margin_db": None,
                "phase_margin_frequency_hz": 1.2e4,
                "resonances": [{"frequency_hz": 1e3, "peak_db": 3.0, "q": 2.0},
                               {"frequency_hz": 5e3, "peak_db": 9.0, "q": 6.0}]}
    limits = [Limit(name="pm", figure="phase_margin_deg", min=45),
              Limit(name="gm", figure="gain_margin_db", min=10),
              Limit(name="fc", figure="crossover_frequency_hz", min=1e4, max=2e4)]
    entries, verdict = evaluate_limits(limits, analysis)
    assert [e["passed"] for e in entries] == [True, False, True]
    assert entries[0]["margin"] == pytest.approx(7.0)
    assert entries[1]["value"] is None and entries[1]["margin"] is None
    assert entries[2]["margin"] == pytest.approx(2e3)
    assert verdict == "fail"
    assert figure_value("resonance_q", analysis) == 6.0
    assert figure_value("closed_loop_thd_pct", analysis, {"thd_pct": 1.5}) == 1.5
    assert evaluate_limits([], analysis) == ([], "none")


def _example_files() -> list[Path]:
    return sorted(data_dir("procedures").glob("*.yaml"))


def test_examples_exist():
    names = {p.name for p in _example_files()}
    assert {"bench-simulated.yaml", "bench-example.yaml", "regulator-overnight.yaml",
            "oscillator-startup.yaml", "production-quick.yaml"} <= names


def _simulated_benches():
    return [load_bench(p) for p in _example_files()
            if p.name.startswith("bench") and "simulated:" in p.read_text(encoding="utf-8")]


@pytest.mark.parametrize("path", _example_files(), ids=lambda p: p.name)
def test_example_files_validate(path: Path):
    text = path.read_text(encoding="utf-8")
    assert "invented" in text.lower()      # examples say they are invented scenarios
    if path.name.startswith("bench"):
        load_bench(path)
        return
    procedure = load_procedure(path)
    # every shipped procedure can run on at least one shipped simulated bench
    refusals = []
    for bench in _simulated_benches():
        try:
            check_against_bench(procedure, bench)
        except (SafetyError, InputError) as exc:
            refusals.append(str(exc))
        else:
            break
    else:
        pytest.fail(f"no shipped simulated bench accepts {path.name}: {refusals}")


def test_negative_simulated_seed_is_refused_at_load(tmp_path):
    """numpy refuses a negative seed; the bench file does first, naming its line."""
    from loopwright.errors import InputError
    from loopwright.procedure.schema import load_bench

    path = tmp_path / "bench.yaml"
    path.write_text("simulated:\n  dut: rational\n  seed: -1\n"
                    "max_amplitude_vpp: 1.0\nmax_frequency_hz: 1.0e6\n")
    with pytest.raises(InputError, match=r"bench.yaml:3: simulated.seed: must be greater"):
        load_bench(path)
