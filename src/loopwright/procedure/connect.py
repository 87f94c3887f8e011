"""Open the instruments a bench file names, real or simulated, as role objects.

A simulated bench (``simulated:`` in the bench file) is started in this process and
reached like hardware: through pyvisa-py over loopback TCP (default) or the
in-process pyvisa backend, so the same driver code runs either way.
"""

from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from loopwright.errors import LoopwrightError
from loopwright.instruments import GeneratorCaps, TrafficLog, open_instrument
from loopwright.instruments.roles import Generator, LoopSwitch, Scope
from loopwright.procedure.schema import Bench


def bench_caps(bench: Bench) -> GeneratorCaps:
    """The bench file's caps, as the generator driver enforces them."""
    return GeneratorCaps(max_amplitude_vpp=bench.max_amplitude_vpp,
                         max_frequency_hz=bench.max_frequency_hz)


@dataclass
class BenchConnection:
    """The open instruments of one run.

    Attributes
    ----------
    generator, scope, switch
        Role objects (``switch`` is None without a loop switch).
    simulated
        True when the instruments are the simulated bench.
    instruments
        role -> {"resource", "idn", "driver"} for the manifest.
    sim
        The simulated bench and its server, for tests and replay (None for hardware).
    """

    bench: Bench
    generator: Generator
    scope: Scope
    switch: LoopSwitch | None
    simulated: bool
    instruments: dict[str, dict[str, Any]]
    resources: dict[str, str]
    backend: Any
    traffic: TrafficLog | None = None
    sim: Any = None
    server: Any = None
    extra_driver_dirs: tuple[Path, ...] = field(default_factory=tuple)

    def caps(self) -> GeneratorCaps:
        """The bench caps the generator driver enforces."""
        return bench_caps(self.bench)

    def reopen(self, role: str) -> Any:
        """Drop one instrument's session and open it afresh (after a lost connection).

        The old session is closed without its teardown (a dead socket would only time
        out); the new one runs the driver's init again and is checked with ``*IDN?``.
        """
        old = getattr(self, role)
        session = getattr(old, "session", None)
        if session is not None:
            with contextlib.suppress(LoopwrightError, OSError):
                session.close_resource()
        instrument = open_instrument(
            self.resources[role], role, driver=self.instruments[role]["driver"],
            backend=self.backend, timeout_s=self.bench.timeout_s, traffic_log=self.traffic,
            extra_driver_dirs=self.extra_driver_dirs,
            caps=self.caps() if role == "generator" else None)
        setattr(self, role, instrument)
        return instrument

    def reopen_generator(self) -> Generator:
        """Open the generator afresh (used by the output-off guard)."""
        return self.reopen("generator")

    def close(self) -> None:
        """Close every instrument (teardown: generator output off first), then the server."""
        for role in ("generator", "switch", "scope"):
            instrument = getattr(self, role)
            if instrument is None:
                continue
            # closing is best effort; the output-off guard already ran
            with contextlib.suppress(LoopwrightError, OSError):
                instrument.close()
        if self.server is not None:
            self.server.close()
            self.server = None


def start_simulated(bench: Bench) -> tuple[Any, Any, dict[str, str], Any]:
    """Start the simulated bench of a bench file.

    Returns
    -------
    sim, server, resources, backend
        The :class:`~mock_instruments.bench.SimulatedBench`, what serves it (a TCP
        server or the in-process bench; both have ``close()``), role -> resource
        string, and the pyvisa backend to use.
    """
    from mock_instruments.bench import Impairments, SimulatedBench
    from mock_instruments.duts import load_dut

    entry = bench.simulated
    assert entry is not None
    dut = load_dut(bench.simulated_dut or entry.dut)
    noise = float(entry.noise_v_rms)
    # a board replayed from a stored run carries each channel's measured noise
    own = getattr(dut, "channel_noise_v_rms", (0.0, 0.0))
    levels = (math.hypot(noise, float(own[0])), math.hypot(noise, float(own[1])))
    sim = SimulatedBench(dut, Impairments(noise_v_rms=levels), seed=entry.seed)
    if entry.transport == "in_process":
        from mock_instruments.visa_backend import InProcessBench

        server = InProcessBench(sim, realtime=entry.real_time)
        return sim, server, dict(server.resources), server.backend
    from mock_instruments.server import serve_bench

    server = serve_bench(sim, realtime=entry.real_time)
    return sim, server, dict(server.resources), "@py"


def connect_bench(bench: Bench, traffic_log: TrafficLog | str | Path | None = None,
                  extra_driver_dirs: tuple[Path, ...] = ()) -> BenchConnection:
    """Open the bench's generator, scope and optional loop switch.

    Raises
    ------
    ConnectionLost, InstrumentTimeout, DriverError, SCPIError
        An instrument does not answer, or no driver fits it.
    """
    traffic = traffic_log if isinstance(traffic_log, TrafficLog) or traffic_log is None \
        else TrafficLog(traffic_log)
    sim = server = None
    if bench.simulated is not None:
        sim, server, resources, backend = start_simulated(bench)
        drivers: dict[str, str | None] = {role: None for role in resources}
    else:
        backend = bench.backend
        resources = {}
        drivers = {}
        for role in ("generator", "scope", "switch"):
            entry = getattr(bench, role)
            if entry is not None:
                resources[role] = entry.resource
                drivers[role] = entry.driver
    caps = bench_caps(bench)
    opened: dict[str, Any] = {}
    try:
        for role in ("generator", "scope", "switch"):
            if role not in resources:
                continue
            opened[role] = open_instrument(
                resources[role], role, driver=drivers.get(role), backend=backend,
                timeout_s=bench.timeout_s, traffic_log=traffic,
                extra_driver_dirs=extra_driver_dirs,
                caps=caps if role == "generator" else None)
    except BaseException:
        for instrument in opened.values():
            with contextlib.suppress(LoopwrightError, OSError):
                instrument.close()
        if server is not None:
            server.close()
        raise
    instruments = {
        role: {"resource": resources[role], "idn": obj.identity, "driver": obj.driver_name}
        for role, obj in opened.items()
    }
    return BenchConnection(
        bench=bench, generator=opened["generator"], scope=opened["scope"],
        switch=opened.get("switch"), simulated=bench.simulated is not None,
        instruments=instruments, resources=resources, backend=backend, traffic=traffic,
        sim=sim, server=server, extra_driver_dirs=tuple(extra_driver_dirs))
