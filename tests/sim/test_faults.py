"""Fault injection in the simulated bench, seen from a plain socket client: what each fault does
to the connection and to the instrument's state (asserted from the simulator itself)."""

from __future__ import annotations

import math
import socket
import time

import pytest

from tonebench.errors import InputError
from tonebench.sim import scpi_parser as scpi
from tonebench.sim.signal_chain import SimBench
from tonebench.config.loading import validate
from tonebench.sim.faults import FaultSchedule, FaultSpec
from tonebench.sim.instruments import SimSource
from tonebench.sim.scenario import Scenario
from tonebench.sim.server import InstrumentServer

TIMEOUT_S = 5.0


class LineClient:
    """Newline-framed client over a plain socket."""

    def __init__(self, port: int, timeout_s: float = TIMEOUT_S) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=timeout_s)
        self.buffer = b""

    def send(self, text: str) -> None:
        self.sock.sendall(text.encode("ascii") + b"\n")

    def read_line(self) -> str:
        while b"\n" not in self.buffer:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise ConnectionError("closed by server")
            self.buffer += chunk
        line, self.buffer = self.buffer.split(b"\n", 1)
        return line.decode("ascii")

    def query(self, text: str) -> str:
        self.send(text)
        return self.read_line()

    def close(self) -> None:
        self.sock.close()


@pytest.fixture
def source_server():
    bench = SimBench(Scenario())
    schedule = FaultSchedule()
    with InstrumentServer(SimSource(bench, 1), bench.lock, faults=schedule) as server:
        yield bench, schedule, server


# --- the schedule -------------------------------------------------------------------------------


def test_schedule_counts_matching_lines_per_instrument():
    schedule = FaultSchedule([FaultSpec(instrument="source1", kind="drop", on="sour:pow", nth=2, every=3, repeat=2)])
    fired_on = []
    for count in range(1, 12):
        assert schedule.faults_for("source2", "SOUR:POW -10") == []  # another instrument never counts
        assert schedule.faults_for("source1", "*OPC?") == []  # nor does a line without the prefix
        if schedule.faults_for("source1", f"SOUR:POW {-count}"):
            fired_on.append(count)
    assert fired_on == [2, 5]  # nth=2, then every 3rd matching line, twice in all
    assert schedule.pending() == []
    assert [f.line for f in schedule.fired] == ["SOUR:POW -2", "SOUR:POW -5"]


def test_empty_prefix_counts_every_line():
    schedule = FaultSchedule([FaultSpec(instrument="analyzer", kind="error", nth=3)])
    hits = [bool(schedule.faults_for("analyzer", line)) for line in ("A", "B?", "C", "D")]
    assert hits == [False, False, True, False]


@pytest.mark.parametrize(
    "row, field",
    [
        ({"instrument": "source1", "kind": "melt"}, "kind"),
        ({"instrument": "source1", "kind": "stall"}, "field 'faults.1': a stall fault needs duration_s"),
        ({"instrument": "source1", "kind": "drop", "nth": 0}, "nth"),
        ({"instrument": "source1", "kind": "drop", "when": 3}, "when"),
    ],
)
def test_bad_fault_rows_are_one_line_input_errors(row, field):
    # As a bench file's [[simulation.faults]] rows are read: through its [simulation] table.
    with pytest.raises(InputError) as caught:
        validate(Scenario, {"faults": [{"instrument": "analyzer", "kind": "drop"}, row]}, "bench file b.toml [simulation]")
    message = str(caught.value)
    assert "\n" not in message and "bench file b.toml [simulation]: field 'faults.1" in message and field in message


# --- each fault at the connection ---------------------------------------------------------------


def test_drop_resets_the_connection_at_once_and_loses_the_line(source_server):
    bench, schedule, server = source_server
    schedule.add(FaultSpec(instrument="source1", kind="drop", on="SOUR:FREQ"))
    client = LineClient(server.port)
    started = time.monotonic()
    client.send("SOUR:FREQ 2e9")
    with pytest.raises((ConnectionResetError, ConnectionError)):
        client.query("SOUR:FREQ?")
    assert time.monotonic() - started < 1.0  # a reset, not a silent close that waits out a timeout
    client.close()
    again = LineClient(server.port)
    try:
        assert float(again.query("SOUR:FREQ?")) == 1e9  # the dropped command never ran
        assert bench.source(1).commanded.freq_hz == 1e9
    finally:
        again.close()


def test_stall_holds_the_reply_and_every_connection(source_server):
    _bench, schedule, server = source_server
    schedule.add(FaultSpec(instrument="source1", kind="stall", on="*IDN?", duration_s=0.6))
    first = LineClient(server.port, timeout_s=0.2)
    second = LineClient(server.port, timeout_s=5.0)
    try:
        first.send("*IDN?")
        with pytest.raises(socket.timeout):
            first.read_line()  # no reply within the client's timeout
        started = time.monotonic()
        assert second.query("SOUR:FREQ?") == "1000000000.0"  # waits for the stall to end
        assert time.monotonic() - started > 0.2
        first.sock.settimeout(5.0)
        assert first.read_line().startswith("tonebench,")  # the late reply of the stalled query
    finally:
        first.close()
        second.close()


def test_stall_without_late_reply_loses_only_that_reply(source_server):
    _bench, schedule, server = source_server
    schedule.add(FaultSpec(instrument="source1", kind="stall", on="*IDN?", duration_s=0.2, late_reply=False))
    client = LineClient(server.port)
    try:
        client.send("*IDN?")
        assert client.query("SOUR:POW?") == "-30.0"  # the first reply line is this query's
    finally:
        client.close()


def test_error_rejects_a_command_and_answers_a_query(source_server):
    bench, schedule, server = source_server
    schedule.add(FaultSpec(instrument="source1", kind="error", on="SOUR:POW", code=scpi.SETTINGS_CONFLICT))
    schedule.add(FaultSpec(instrument="source1", kind="error", on="*OPC?", code=scpi.HARDWARE_ERROR))
    client = LineClient(server.port)
    try:
        client.send("SOUR:POW -12")
        assert client.query("*OPC?") == "1"
        assert bench.source(1).commanded.power_dbm == -30.0  # not executed
        assert client.query("SYST:ERR?").startswith('-221,"Settings conflict;simulated fault')
        assert client.query("SYST:ERR?").startswith('-240,"Hardware error')
        assert client.query("SYST:ERR?") == '0,"No error"'
    finally:
        client.close()


def test_reboot_loses_the_state_and_every_connection(source_server):
    bench, schedule, server = source_server
    schedule.add(FaultSpec(instrument="source1", kind="reboot", on="SOUR:FREQ"))
    client, other = LineClient(server.port), LineClient(server.port)
    try:
        client.send("SOUR:POW -12;:OUTP ON")
        assert client.query("*OPC?") == "1"
        assert other.query("*OPC?") == "1"  # both connections served before the reboot
        assert bench.source(1).effective.rf_on
        client.send("BOGUS")  # leaves an entry in the error queue
        client.send("SOUR:FREQ 2e9")
        with pytest.raises((ConnectionResetError, ConnectionError)):
            client.read_line()  # reset: this connection saw the reboot
        with pytest.raises((ConnectionResetError, ConnectionError)):
            other.query("*IDN?")  # and so did the other one
    finally:
        client.close()
        other.close()
    fresh = LineClient(server.port)
    try:
        assert fresh.query("OUTP?") == "0"
        assert float(fresh.query("SOUR:POW?")) == -30.0
        assert fresh.query("SYST:ERR?") == '0,"No error"'  # the queue went with the power
        assert int(fresh.query("*ESR?")) & scpi.ESR_POWER_ON
        assert fresh.query("*OPC?") == "1"
        assert not bench.source(1).effective.rf_on  # RF off in the simulator itself
    finally:
        fresh.close()


def test_preset_reboot_keeps_the_connection_and_runs_the_line(source_server):
    bench, schedule, server = source_server
    schedule.add(FaultSpec(instrument="source1", kind="reboot", on="SOUR:FREQ", keep_connection=True))
    client = LineClient(server.port)
    try:
        client.send("SOUR:POW -12;:OUTP ON")
        client.send("SOUR:FREQ 2e9")
        assert client.query("OUTP?;:SOUR:POW?;:SOUR:FREQ?") == "0;-30.0;2000000000.0"
        assert not bench.source(1).commanded.rf_on
    finally:
        client.close()


def test_stop_ends_a_long_stall_at_once():
    bench = SimBench(Scenario())
    schedule = FaultSchedule([FaultSpec(instrument="source1", kind="stall", duration_s=600.0)])
    server = InstrumentServer(SimSource(bench, 1), bench.lock, faults=schedule)
    server.start()
    client = LineClient(server.port, timeout_s=0.2)
    client.send("*IDN?")
    with pytest.raises(socket.timeout):
        client.read_line()
    started = time.monotonic()
    server.stop()
    assert time.monotonic() - started < 2.0
    client.close()


def test_unsettled_level_is_off_after_the_change_and_settles_on_the_virtual_clock():
    bench = SimBench(Scenario())
    schedule = FaultSchedule([FaultSpec(instrument="source1", kind="unsettled", on="SOUR:POW",
                                        level_error_db=3.0, duration_s=0.05)])
    with InstrumentServer(SimSource(bench, 1), bench.lock, faults=schedule) as server:
        client = LineClient(server.port)
        try:
            client.send("SOUR:FREQ 2.45e9")
            client.send("OUTP ON")
            client.send("SOUR:POW -20")
            assert client.query("*OPC?") == "1"  # the source says done all the same
            assert float(client.query("SOUR:POW?")) == -20.0  # and reports its setting
        finally:
            client.close()
    loss_db = bench.truth.true_loss_db("in1", 2.45e9)
    with bench.lock:
        assert bench.true_input_plane_dbm() == pytest.approx(-20.0 - loss_db + 3.0, abs=1e-9)
        bench.clock_s += 0.1  # two time constants later (what two sweeps would take)
        assert bench.true_input_plane_dbm() == pytest.approx(-20.0 - loss_db + 3.0 * math.exp(-2.0), abs=1e-6)


def test_faults_from_the_bench_file_table_reach_every_instrument():
    from tonebench.sim.launch import start_sim_bench

    scenario = Scenario.model_validate({"faults": [{"instrument": "analyzer", "kind": "drop", "on": "*IDN?"},
                                                   {"instrument": "source2", "kind": "error", "on": "*IDN?"}]})
    with start_sim_bench(scenario) as sim:
        for role in ("analyzer", "source2", "source1"):
            client = LineClient(int(sim.resources[role].split("::")[2]))
            try:
                client.send("*IDN?")
                if role == "analyzer":
                    with pytest.raises((ConnectionResetError, ConnectionError)):
                        client.read_line()
                else:
                    assert client.read_line().startswith("tonebench,")
            finally:
                client.close()
        assert [(fired.instrument, fired.spec.kind) for fired in sim.faults.fired] == [("analyzer", "drop"), ("source2", "error")]
