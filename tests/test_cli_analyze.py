"""``loopwright analyze``: the table, the JSON, the bundled examples, bad files."""

from __future__ import annotations

import importlib.util
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from loopwright.cli import main

REPO = Path(__file__).resolve().parent.parent
EXAMPLES = REPO / "examples"
JSON_KEYS = {
    "gain_crossovers", "zero_phase_crossings", "phase_margin_deg", "gain_margin_db",
    "oscillation_predicted", "oscillation_frequency_hz", "resonances", "bandwidth_hz",
    "interpolation", "phase_margin_deg_std", "gain_margin_db_std", "excess_gain",
}


def _examples_module():
    spec = importlib.util.spec_from_file_location("make_responses",
                                                  EXAMPLES / "make_responses.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _json(capsys, *argv: str) -> dict:
    assert main(["analyze", *argv, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_json_has_the_documented_keys(capsys) -> None:
    data = _json(capsys, str(EXAMPLES / "buck_loop_response.csv"))
    assert set(data) >= JSON_KEYS
    assert set(data["gain_crossovers"][0]) >= {"frequency_hz", "phase_margin_deg"}
    assert set(data["zero_phase_crossings"][0]) >= {
        "frequency_hz", "loop_gain", "gain_margin_db", "barkhausen_met", "excess_gain"}
    assert set(data["resonances"][0]) >= {"frequency_hz", "peak_db", "q"}


def test_buck_example_against_python_control(capsys) -> None:
    # python-control stability_margins on a dense exact FRD of the same invented loop
    # (its own interpolation and brentq); our figures come from the noisy 20/decade file.
    import control  # test dependency: missing fails, never skips
    module = _examples_module()
    f = np.logspace(2, 6, 4001)
    w = 2 * np.pi * f
    gm, pm, _sm, w_180, w_c, _ws = control.stability_margins(
        control.frd(module.buck_loop(f), w))
    data = _json(capsys, str(EXAMPLES / "buck_loop_response.csv"))
    assert data["oscillation_predicted"] is False
    assert abs(data["phase_margin_deg"] - pm) < 3 * data["phase_margin_deg_std"] + 0.01
    assert abs(data["gain_margin_db"] - 20 * np.log10(gm)) < 3 * data["gain_margin_db_std"] + 0.01
    assert data["phase_margin_frequency_hz"] == pytest.approx(w_c / (2 * np.pi), rel=3e-3)
    assert data["gain_margin_frequency_hz"] == pytest.approx(w_180 / (2 * np.pi), rel=3e-3)


def test_tank_example_predicts_oscillation(capsys) -> None:
    # Invented tuned loop: tank at 2.5 MHz, Q 40, peak round-trip gain 1.4 (make_responses).
    data = _json(capsys, str(EXAMPLES / "tank_oscillator_loop_response.csv"))
    assert data["interpolation"] == "aaa"
    assert data["oscillation_predicted"] is True
    assert data["oscillation_frequency_hz"] == pytest.approx(2.5e6, rel=3e-3)
    assert data["excess_gain"] == pytest.approx(1.4, rel=5e-3)
    assert data["resonances"][0]["q"] == pytest.approx(40, rel=1e-3)


def test_table_shows_a_bracketed_path_as_text(tmp_path, capsys) -> None:
    # a folder "x[" and a file "y].csv" make the path hold "[/y]": text, not rich markup
    (tmp_path / "x[").mkdir()
    odd = tmp_path / "x[" / "y].csv"
    odd.write_bytes((EXAMPLES / "buck_loop_response.csv").read_bytes())
    assert main(["analyze", str(odd)]) == 0
    assert "[/y].csv" in capsys.readouterr().out.replace("\n", "")


def test_examples_are_what_the_script_writes(tmp_path, monkeypatch) -> None:
    # The committed CSVs are reproducible from the script (deterministic, seeded).
    module = _examples_module()
    monkeypatch.setattr(module, "HERE", tmp_path)
    module.main()
    for written in tmp_path.glob("*.csv"):
        assert written.read_text() == (EXAMPLES / written.name).read_text(), written.name


def test_table_output(capsys) -> None:
    assert main(["analyze", str(EXAMPLES / "tank_oscillator_loop_response.csv")]) == 0
    out = capsys.readouterr().out
    for words in ("phase margin", "gain margin", "oscillation predicted", "yes",
                  "Resonances", "met", "interpolation aaa"):
        assert words in out


def test_table_for_a_loop_without_crossings(tmp_path, capsys) -> None:
    path = tmp_path / "flat.csv"
    path.write_text("frequency_hz,gain_db,phase_deg\n100,-20,0\n1000,-20.1,-5\n"
                    "10000,-23,-45\n")
    assert main(["analyze", str(path)]) == 0
    out = capsys.readouterr().out
    assert "not reached" in out and "No crossing" in out


@pytest.mark.parametrize(
    ("text", "where"),
    [
        ("frequency_hz,gain_db,phase_deg\n1000,1,2\n", "bad.csv: "),
        ("frequency_hz,gain_db,phase_deg\n1000,1,2\n900,1,2\n", "bad.csv:3: frequency_hz: "),
        ("frequency_hz,gain_db,phase_deg\n1000,x,2\n2000,1,2\n", "bad.csv:2: gain_db: "),
        ("frequency_hz,gain_db\n1000,1\n2000,1\n", "bad.csv:1: "),
    ],
)
def test_bad_file_is_one_line_exit_2(tmp_path, capsys, text, where) -> None:
    path = tmp_path / "bad.csv"
    path.write_text(text)
    assert main(["analyze", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert where in err and "Traceback" not in err


def test_readme_first_command_runs_in_a_subprocess() -> None:
    # The README's first command, from the checkout (no traceback, exit 0).
    result = subprocess.run(
        [sys.executable, "-m", "loopwright", "analyze", "examples/buck_loop_response.csv"],
        cwd=REPO, capture_output=True, text=True, timeout=120, check=False,
    )
    assert result.returncode == 0, result.stderr
    assert "phase margin" in result.stdout


def test_missing_file_in_a_subprocess_exits_2(tmp_path) -> None:
    result = subprocess.run(
        [sys.executable, "-m", "loopwright", "analyze", str(tmp_path / "none.csv")],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert result.returncode == 2
    assert result.stderr.strip().endswith("no such file")
    assert "Traceback" not in result.stderr and result.stderr.count("\n") == 1


def test_bad_sign_is_rejected(capsys) -> None:
    with pytest.raises(SystemExit) as info:
        main(["analyze", str(EXAMPLES / "buck_loop_response.csv"), "--sign", "2"])
    assert info.value.code == 2
