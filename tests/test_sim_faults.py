"""Each fault hook, observed the way a client sees it: pyvisa-py over loopback TCP.

What a client sees follows the measured pyvisa-py behaviour in the project's visa notes:
a late reply raises VisaIOError VI_ERROR_TMO and arrives as stale data on the next
read unless ``clear()`` runs; a dropped socket is not noticed until the timeout.
"""

from __future__ import annotations

import time

import numpy as np
import pytest
from pyvisa import constants
from pyvisa.errors import VisaIOError

from mock_instruments.faults import Faults

TMO = constants.StatusCode.error_timeout


def idn_of(server, role: str) -> str:
    return server.instruments[role].identity


def test_late_reply_on_one_query_times_out_then_comes_as_stale_data(sim_bench, open_sim):
    gen = open_sim(sim_bench.resources["generator"], timeout_s=0.15)
    sim_bench.instruments["generator"].faults.delay_reply(0.4, at_query=1)
    with pytest.raises(VisaIOError) as err:
        gen.query("*IDN?")
    assert err.value.error_code == TMO
    time.sleep(0.4)
    # The next query gets the stale *IDN? reply (visa notes), not its own.
    assert gen.query("SOUR1:FREQ?") == idn_of(sim_bench, "generator")
    assert gen.read() == "1000"  # and its own reply is still waiting
    assert gen.query("SOUR1:FREQ?") == "1000"  # one-shot: back to normal


def test_clear_discards_a_late_reply(sim_bench, open_sim):
    gen = open_sim(sim_bench.resources["generator"], timeout_s=0.1)
    sim_bench.instruments["generator"].faults.delay_reply(0.2, at_query=1)
    with pytest.raises(VisaIOError):
        gen.query("*IDN?")
    time.sleep(0.2)
    gen.clear()
    assert gen.query("SOUR1:FREQ?") == "1000"


def test_delay_on_every_reply(sim_bench, open_sim):
    gen = open_sim(sim_bench.resources["generator"])
    sim_bench.instruments["generator"].faults.delay_reply(0.05)
    start = time.perf_counter()
    for _ in range(3):
        assert gen.query("SOUR1:FREQ?") == "1000"
    assert time.perf_counter() - start >= 0.15
    sim_bench.instruments["generator"].faults.clear()
    start = time.perf_counter()
    assert gen.query("SOUR1:FREQ?") == "1000"
    assert time.perf_counter() - start < 0.05


def test_drop_connection_at_the_nth_message(sim_bench, open_sim):
    gen = open_sim(sim_bench.resources["generator"], timeout_s=0.2)
    sim_bench.instruments["generator"].faults.drop_connection(at_message=2)
    gen.write("SOUR1:FREQ 2000")  # message 1: executed
    with pytest.raises((VisaIOError, OSError)):
        gen.query("SOUR1:FREQ 3000;FREQ?")  # message 2: connection closed, not executed
    # The instrument itself lives on: a new connection works.
    fresh = open_sim(sim_bench.resources["generator"])
    assert fresh.query("SOUR1:FREQ?") == "2000"


def test_random_garbage_reply(sim_bench, open_sim):
    gen = open_sim(sim_bench.resources["generator"])
    sim_bench.instruments["generator"].faults.garbage_reply(at_query=2, kind="random")
    assert gen.query("SOUR1:FREQ?") == "1000"
    gen.write("*IDN?")
    garbled = gen.read_raw()
    assert garbled.endswith(b"\n") and garbled.count(b"\n") == 1
    assert garbled.rstrip(b"\n") != idn_of(sim_bench, "generator").encode()
    assert gen.query("SOUR1:FREQ?") == "1000"


def test_truncated_block_times_out(sim_bench, open_sim):
    scope = open_sim(sim_bench.resources["scope"], timeout_s=0.3)
    scope.write("TIM:POIN 1000;:ACQ:SING")
    assert scope.query("*OPC?") == "1"
    sim_bench.instruments["scope"].faults.garbage_reply(at_query=1, kind="truncated")
    with pytest.raises(VisaIOError) as err:
        scope.query_binary_values("WAV:DATA?", datatype="h", container=np.array)
    assert err.value.error_code == TMO
    scope.clear()
    data = scope.query_binary_values("WAV:DATA?", datatype="h", container=np.array)
    assert len(data) == 1000


def test_pushed_error_is_read_from_the_queue(sim_bench, open_sim):
    scope = open_sim(sim_bench.resources["scope"])
    sim_bench.instruments["scope"].faults.push_error(-410, "Query INTERRUPTED")
    assert scope.query("SYST:ERR?") == '-410,"Query INTERRUPTED"'
    assert scope.query("SYST:ERR?") == '0,"No error"'


def test_stop_answering_until_cleared(sim_bench, open_sim):
    gen = open_sim(sim_bench.resources["generator"], timeout_s=0.15)
    faults = sim_bench.instruments["generator"].faults
    faults.stop_answering(at_message=1)
    with pytest.raises(VisaIOError):
        gen.query("*IDN?")
    gen.write("SOUR1:FREQ 5000")  # not executed while stopped
    with pytest.raises(VisaIOError):
        gen.query("SOUR1:FREQ?")
    # A new connection does not help ...
    other = open_sim(sim_bench.resources["generator"], timeout_s=0.15)
    with pytest.raises(VisaIOError):
        other.query("*IDN?")
    # ... until the test releases it.
    faults.clear()
    assert gen.query("SOUR1:FREQ?") == "1000"


def test_stop_answering_until_reconnect(sim_bench, open_sim):
    gen = open_sim(sim_bench.resources["generator"], timeout_s=0.15)
    sim_bench.instruments["generator"].faults.stop_answering(until_reconnect=True)
    with pytest.raises(VisaIOError):
        gen.query("*IDN?")
    fresh = open_sim(sim_bench.resources["generator"])
    assert fresh.query("*IDN?") == idn_of(sim_bench, "generator")


def test_refused_amplitude_is_222_and_keeps_the_old_value(sim_bench, open_sim):
    gen = open_sim(sim_bench.resources["generator"])
    sim_bench.instruments["generator"].faults.refuse_amplitude_above(1.0)
    gen.write("SOUR1:VOLT 0.8")
    gen.write("SOUR1:VOLT 1.2")
    assert gen.query("SYST:ERR?").startswith("-222,")
    assert gen.query("SOUR1:VOLT?") == "0.8"
    assert sim_bench.bench.generator.amplitude_vpp == 0.8


def test_acquisition_that_never_completes(sim_bench, open_sim):
    scope = open_sim(sim_bench.resources["scope"], timeout_s=0.2)
    sim_bench.instruments["scope"].faults.never_complete_acquisition()
    scope.write("ACQ:SING")
    with pytest.raises(VisaIOError) as err:
        scope.query("*OPC?")
    assert err.value.error_code == TMO
    assert scope.query("ACQ:STAT?") == "BUSY"


def test_text_scope_acquisition_that_never_completes(start_sim_bench, open_sim):
    server = start_sim_bench(scope="scope-text")
    scope = open_sim(server.resources["scope"])
    server.instruments["scope"].faults.never_complete_acquisition()
    scope.write(":ACQ:ARM")
    assert scope.query(":ACQ:DONE?") == "0"
    server.instruments["scope"].faults.clear()
    scope.write(":ACQ:ARM")
    assert scope.query(":ACQ:DONE?") == "1"


# -- the same hooks through the in-process backend ---------------------------------------


def test_inprocess_late_reply_times_out_then_is_stale(inprocess_bench):
    rm = inprocess_bench.resource_manager()
    gen = rm.open_resource(
        inprocess_bench.resources["generator"],
        read_termination="\n",
        write_termination="\n",
        timeout=100,
    )
    inprocess_bench.instruments["generator"].faults.delay_reply(0.2, at_query=1)
    with pytest.raises(VisaIOError) as err:
        gen.query("*IDN?")
    assert err.value.error_code == TMO
    time.sleep(0.15)
    assert gen.query("SOUR1:FREQ?").startswith("loopwright,simulated generator")
    gen.clear()
    assert gen.query("SOUR1:FREQ?") == "1000"


def test_inprocess_dropped_connection_is_connection_lost(inprocess_bench):
    rm = inprocess_bench.resource_manager()
    gen = rm.open_resource(
        inprocess_bench.resources["generator"], read_termination="\n", write_termination="\n"
    )
    inprocess_bench.instruments["generator"].faults.drop_connection()
    gen.write("*IDN?")
    with pytest.raises(VisaIOError) as err:
        gen.read()
    assert err.value.error_code == constants.StatusCode.error_connection_lost
    gen.close()
    again = rm.open_resource(
        inprocess_bench.resources["generator"], read_termination="\n", write_termination="\n"
    )
    assert again.query("SOUR1:FREQ?") == "1000"


# -- the plan itself ----------------------------------------------------------------------


def test_fault_counts_are_relative_to_arming_and_one_shot() -> None:
    faults = Faults()

    def execute(message: str):
        return (b"ok\n", 0.0) if message.endswith("?") else (None, 0.0)

    faults.process("A", execute)
    faults.delay_reply(1.5, at_query=2)
    outcomes = [faults.process(m, execute) for m in ("X?", "B", "Y?", "Z?")]
    assert [o.delay_s for o in outcomes] == [0.0, 0.0, 1.5, 0.0]
    faults.drop_connection(at_message=2)
    assert [faults.process("Q?", execute).drop for _ in range(3)] == [False, True, False]


@pytest.mark.parametrize("bad", [0, -1, 1.5])
def test_fault_counts_must_be_positive_integers(bad) -> None:
    with pytest.raises(ValueError, match="integer >= 1"):
        Faults().drop_connection(at_message=bad)
