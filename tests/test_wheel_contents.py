"""An installed wheel carries the drivers, procedures, examples and simulated bench."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_wheel_holds_the_data_folders(tmp_path):
    if not (REPO / "pyproject.toml").exists():
        pytest.skip("not run from a source checkout")
    result = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(tmp_path),
         str(REPO)], capture_output=True, text=True, timeout=600)
    assert result.returncode == 0, result.stderr
    wheel = next(tmp_path.glob("loopwright-*.whl"))
    names = set(zipfile.ZipFile(wheel).namelist())
    shipped_drivers = {p.name for p in (REPO / "drivers").glob("*.yaml")}
    assert {f"loopwright/_data/drivers/{n}" for n in shipped_drivers} <= names
    assert "loopwright/_data/procedures/oscillator-startup.yaml" in names
    assert "loopwright/_data/procedures/bench-oscillator-sim.yaml" in names
    assert "loopwright/_data/examples/buck_loop_response.csv" in names
    assert "mock_instruments/bench.py" in names
    assert any(n.startswith("mock_instruments/dut_files/") for n in names)


def test_installed_package_finds_its_drivers():
    """data_dir finds the drivers wherever the package is installed from."""
    from loopwright.instruments import find_drivers
    from loopwright.resources import data_dir

    folder = data_dir("drivers")
    assert (folder / "scope-block.yaml").exists()
    assert {d.name for d in find_drivers()} >= {"scope-block", "scope-text",
                                                "generator-source-tree",
                                                "generator-output-tree", "switch-relay"}
