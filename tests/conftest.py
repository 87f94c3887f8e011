"""Shared fixtures: a pyvisa resource manager and simulated benches (TCP and in-process).

Fixtures
--------
visa_rm
    Session-scoped ``pyvisa.ResourceManager('@py')`` (a process-wide singleton).
start_sim_bench
    Factory: ``start_sim_bench(dut="rational", *, generator=..., scope=..., switch=...,
    noise_v_rms=0.0, adc_bits=12, impairments=None, seed=0, realtime=False, clock=None,
    **dut_params) -> BenchServer`` serves a new simulated bench on loopback TCP
    (``.resources`` role -> ``TCPIP0::127.0.0.1::PORT::SOCKET``, ``.instruments`` role ->
    model with ``.faults`` and ``.errors``, ``.bench``); every bench is closed at teardown.
sim_bench
    One default bench from ``start_sim_bench()`` (DUT ``rational``, source-tree
    generator, block scope, relay box).
open_sim
    Factory: ``open_sim(resource, timeout_s=2.0, rm=None)`` -> a pyvisa resource with
    ``\\n`` terminations, closed at teardown before the servers stop.
start_inprocess_bench / inprocess_bench
    The same through :class:`mock_instruments.visa_backend.InProcessBench`
    (``.resources``, ``.instruments``, ``.bench``, ``.backend``, ``.resource_manager()``).
scpi_recorder
    A recording SCPI server on loopback TCP (``tests/scpi_recorder.py``): ``.resource``,
    ``.identity``, ``.commands``, ``.state``, ``.errors``, ``.replies``, ``.reject``.
scaffold_files
    ``(procedure, bench)``: two invented placeholder files in ``tmp_path``.
fake_clock
    A settable clock for ``SimulatedBench(clock=...)``: ``fake_clock.advance(seconds)``.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

import pytest
import pyvisa
from hypothesis import settings

from fake_clock import FakeClock

# CI is reproducible: the same examples on every run (a fixed seed per test).
settings.register_profile("ci", derandomize=True, print_blob=True)
if os.environ.get("CI") == "true":
    settings.load_profile("ci")

if TYPE_CHECKING:
    from mock_instruments.bench import Impairments, SimulatedBench
    from mock_instruments.server import BenchServer
    from mock_instruments.visa_backend import InProcessBench
    from scpi_recorder import RecordingServer


#: A served bench: a BenchServer or an InProcessBench (both have ``close()``).
Handle = TypeVar("Handle")


def make_bench(
    dut: str = "rational",
    *,
    noise_v_rms: float = 0.0,
    adc_bits: int = 12,
    impairments: Impairments | None = None,
    seed: int | None = 0,
    clock: Callable[[], float] | None = None,
    **dut_params: Any,
) -> SimulatedBench:
    """A simulated bench around ``dut`` (name or file, with parameter overrides)."""
    # Imported here so that a broken simulator fails only the tests that use it.
    from mock_instruments.bench import Impairments, SimulatedBench
    from mock_instruments.duts import load_dut

    if impairments is None:
        impairments = Impairments(noise_v_rms=(noise_v_rms, noise_v_rms), adc_bits=adc_bits)
    model = load_dut(dut, **dut_params)
    kwargs: dict[str, Any] = {"seed": seed}
    if clock is not None:
        kwargs["clock"] = clock
    return SimulatedBench(model, impairments, **kwargs)


def _dialects(generator: str, scope: str, switch: str | None) -> dict[str, str]:
    dialects = {"generator": generator, "scope": scope}
    if switch is not None:
        dialects["switch"] = switch
    return dialects


def _bench_factory(open_bench: Callable[..., Handle]) -> Iterator[Callable[..., Handle]]:
    """Yield a factory of benches opened by ``open_bench(bench, dialects, realtime=...)``.

    Every bench it opened is closed when the generator resumes (the fixture's teardown).
    """
    handles: list[Handle] = []

    def start(
        dut: str = "rational",
        *,
        generator: str = "generator-source-tree",
        scope: str = "scope-block",
        switch: str | None = "switch-relay",
        realtime: bool = False,
        **bench_options: Any,
    ) -> Handle:
        bench = make_bench(dut, **bench_options)
        handle = open_bench(bench, _dialects(generator, scope, switch), realtime=realtime)
        handles.append(handle)
        return handle

    yield start
    for handle in handles:
        handle.close()


@pytest.fixture(scope="session")
def visa_rm() -> Iterator[pyvisa.ResourceManager]:
    """The process-wide pyvisa-py resource manager."""
    rm = pyvisa.ResourceManager("@py")
    yield rm


@pytest.fixture
def fake_clock() -> FakeClock:
    """A clock tests move by hand."""
    return FakeClock()


@pytest.fixture
def start_sim_bench() -> Iterator[Callable[..., BenchServer]]:
    """Factory serving simulated benches on loopback TCP; all closed at teardown."""
    from mock_instruments.server import serve_bench

    yield from _bench_factory(serve_bench)


@pytest.fixture
def sim_bench(start_sim_bench: Callable[..., BenchServer]) -> BenchServer:
    """A default simulated bench on loopback TCP."""
    return start_sim_bench()


@pytest.fixture
def open_sim(
    visa_rm: pyvisa.ResourceManager, start_sim_bench: Callable[..., BenchServer]
) -> Iterator[Callable[..., Any]]:
    """Factory opening pyvisa resources with ``\\n`` terminations; closed at teardown."""
    opened: list[Any] = []

    def open_resource(resource: str, timeout_s: float = 2.0, rm: Any = None) -> Any:
        manager = visa_rm if rm is None else rm
        inst = manager.open_resource(
            resource,
            read_termination="\n",
            write_termination="\n",
            timeout=int(timeout_s * 1000),
        )
        opened.append(inst)
        return inst

    yield open_resource
    for inst in reversed(opened):
        with contextlib.suppress(Exception):  # a resource a fault already broke
            inst.close()


@pytest.fixture
def start_inprocess_bench() -> Iterator[Callable[..., InProcessBench]]:
    """Factory of in-process simulated benches (pyvisa without sockets)."""
    from mock_instruments.visa_backend import InProcessBench

    yield from _bench_factory(InProcessBench)


@pytest.fixture
def inprocess_bench(start_inprocess_bench: Callable[..., InProcessBench]) -> InProcessBench:
    """A default in-process simulated bench."""
    return start_inprocess_bench()


@pytest.fixture
def scaffold_files(tmp_path: Path) -> tuple[Path, Path]:
    """An invented procedure and bench file (placeholders the production tests pass on)."""
    procedure = tmp_path / "procedure.yaml"
    procedure.write_text("name: scaffold-loop\n# invented procedure for tests\n")
    bench = tmp_path / "bench.yaml"
    bench.write_text("# invented bench for tests\n")
    return procedure, bench


@pytest.fixture
def scpi_recorder(visa_rm: pyvisa.ResourceManager) -> Iterator[RecordingServer]:
    """A recording SCPI server on loopback TCP (``tests/scpi_recorder.py``)."""
    from scpi_recorder import serving

    with serving() as server:
        yield server


def pytest_terminal_summary(terminalreporter: Any) -> None:
    """Print the reliability table when the fault-injection tests ran."""
    import sys

    for name, module in list(sys.modules.items()):
        if name.endswith("test_reliability") and getattr(module, "RESULTS", None):
            terminalreporter.write_line("")
            for line in module.table_lines():
                terminalreporter.write_line(line)
