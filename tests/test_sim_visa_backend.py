"""The in-process pyvisa backend: real MessageBasedResource objects without sockets.

Where a driver could tell the difference it behaves like pyvisa-py's SOCKET sessions
(visa notes, measured): no end-of-message, so a read without a termination waits for
its byte count or the timeout.
"""

from __future__ import annotations

import time

import numpy as np
import pytest
from pyvisa import constants
from pyvisa.errors import VisaIOError
from pyvisa.resources import MessageBasedResource

from mock_instruments.visa_backend import InProcessBackend


def open_resource(handle, role: str, timeout_ms: int = 2000, **kwargs):
    rm = handle.resource_manager()
    options = {"read_termination": "\n", "write_termination": "\n", "timeout": timeout_ms}
    options.update(kwargs)
    return rm.open_resource(handle.resources[role], **options)


def test_resources_are_real_message_based_resources(inprocess_bench):
    scope = open_resource(inprocess_bench, "scope")
    assert isinstance(scope, MessageBasedResource)
    assert scope.query("*IDN?").startswith("loopwright,simulated scope (scope-block),SIM-")
    assert set(inprocess_bench.resource_manager().list_resources()) == set(
        inprocess_bench.resources.values()
    )


def test_each_bench_has_its_own_backend(start_inprocess_bench):
    first = start_inprocess_bench()
    second = start_inprocess_bench(generator="generator-output-tree")
    assert first.backend is not second.backend
    assert first.backend.library_path != second.backend.library_path
    assert InProcessBackend(first) is first.backend  # pyvisa's per-path cache
    gen = open_resource(second, "generator")
    assert "generator-output-tree" in gen.query("*IDN?")
    with pytest.raises(VisaIOError):
        first.resource_manager().open_resource(second.resources["generator"])


def test_binary_block_through_query_binary_values(inprocess_bench):
    scope = open_resource(inprocess_bench, "scope")
    gen = open_resource(inprocess_bench, "generator")
    gen.write("SOUR1:FREQ 1e4;VOLT 2;:OUTP1 ON")
    scope.write("CHAN1:SCAL 0.5;:TIM:POIN 100000;SRAT 1e7;:WAV:ORD MSBF;:ACQ:SING")
    assert scope.query("*OPC?") == "1"
    data = scope.query_binary_values(
        "WAV:DATA?", datatype="h", is_big_endian=True, container=np.array
    )
    model = inprocess_bench.instruments["scope"]
    np.testing.assert_array_equal(data.astype(np.int16), model.codes(model.record, 1))
    assert scope.query("*OPC?") == "1"  # still in step after the block


def test_read_without_termination_times_out_like_a_socket(inprocess_bench):
    gen = open_resource(inprocess_bench, "generator", timeout_ms=100, read_termination=None)
    gen.write("*IDN?")
    with pytest.raises(VisaIOError) as err:
        gen.read_raw()
    assert err.value.error_code == constants.StatusCode.error_timeout


def test_realtime_acquisition_waits_its_duration(start_inprocess_bench):
    handle = start_inprocess_bench(realtime=True)
    scope = open_resource(handle, "scope")
    scope.write("TIM:POIN 20000;SRAT 1e5;:ACQ:SING")  # 0.2 s of record
    start = time.monotonic()
    assert scope.query("ACQ:STAT?") == "BUSY"
    assert scope.query("*OPC?") == "1"
    assert time.monotonic() - start >= 0.15
    assert scope.query("ACQ:STAT?") == "DONE"


def test_realtime_acquisition_over_tcp(start_sim_bench, open_sim):
    server = start_sim_bench(scope="scope-text", realtime=True)
    scope = open_sim(server.resources["scope"])
    scope.write(":ACQ:LENG 20000;RATE 1e5;:ACQ:ARM")
    assert scope.query(":ACQ:DONE?") == "0"
    time.sleep(0.25)
    assert scope.query(":ACQ:DONE?") == "1"
    assert len(scope.query(":TRAC? INP2").split(",")) == 20000
