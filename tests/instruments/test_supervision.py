"""Connection supervision against the simulated bench over real sockets (pyvisa-py): each fault
is injected in the simulator, and the outcome is asserted from the simulator's own state."""

from __future__ import annotations

import threading
import time
from pathlib import Path

import pytest

from tonebench.errors import InstrumentError
from tonebench.instruments import (
    AnalyzerSetup,
    SignalSource,
    SpectrumAnalyzer,
    load_dialect,
    open_resource,
)
from tonebench.instruments.scpi import IdentityChanged, ScpiInstrument
from tonebench.instruments.supervision import RecoveryStopped, RetryPolicy, Supervision
from tonebench.packaged import data_dir
from tonebench.sim import scpi_parser as sim_scpi
from tonebench.sim.faults import FaultSchedule, FaultSpec
from tonebench.sim.instruments import SimSource
from tonebench.sim.launch import start_sim_bench
from tonebench.sim.scenario import Scenario
from tonebench.sim.server import InstrumentServer

QUERY_TIMEOUT_S = 0.5
FAST = RetryPolicy(retries=2, reconnects=3, backoff_s=0.01, max_backoff_s=0.05)
SETUP = AnalyzerSetup(span_hz=10e3, rbw_hz=1e3, vbw_hz=1e3, atten_db=20.0, ref_level_dbm=0.0)


def fast_dialect(tmp_path: Path, name: str):
    """The packaged dialect with a short query timeout, so stalls cost tenths of a second."""
    text = (data_dir("drivers") / f"{name}.toml").read_text()
    assert "query_timeout_s = 5.0" in text
    path = tmp_path / f"{name}-fast.toml"
    path.write_text(text.replace("query_timeout_s = 5.0", f"query_timeout_s = {QUERY_TIMEOUT_S}"))
    return load_dialect(str(path))


class Events(list):
    def __call__(self, event) -> None:
        self.append(event)

    def kinds(self) -> list[str]:
        return [event.kind for event in self]


@pytest.fixture
def bench(tmp_path):
    """A running simulated bench with a fault schedule, and a factory for supervised drivers."""
    schedule = FaultSchedule()
    events = Events()
    supervision = Supervision(FAST, events)
    with start_sim_bench(Scenario(), schedule) as sim:

        def open_driver(role: str):
            dialect = fast_dialect(tmp_path, "generic-analyzer" if role == "analyzer" else "generic-source")
            inst = ScpiInstrument(open_resource(sim.resources[role], dialect, role), dialect, role, supervision)
            assert inst.idn  # recorded for the identity check on reopen
            return SpectrumAnalyzer(inst) if role == "analyzer" else SignalSource(inst)

        yield sim, schedule, events, supervision, open_driver


def test_backoff_doubles_up_to_its_cap():
    policy = RetryPolicy(backoff_s=0.1, max_backoff_s=0.35)
    assert [policy.wait_s(n) for n in range(4)] == [0.1, 0.2, 0.35, 0.35]


def test_dropped_connection_is_reopened_and_the_source_state_reapplied(bench):
    sim, schedule, events, _sup, open_driver = bench
    source = open_driver("source1")
    source.set_tone(2.4e9, -20.0)
    source.rf_on()
    schedule.add(FaultSpec(instrument="source1", kind="drop", on="SOUR:POW"))
    source.set_tone(2.41e9, -18.0)
    channel = sim.bench.source(1)
    assert (channel.effective.freq_hz, channel.effective.power_dbm, channel.effective.rf_on) == (2.41e9, -18.0, True)
    assert source.instrument.epoch == 1
    assert "reconnect" in events.kinds() and "reapplied" in events.kinds()
    assert len(schedule.fired) == 1


def test_late_reply_after_a_stall_is_discarded_not_taken_for_the_next_answer(bench):
    sim, schedule, events, _sup, open_driver = bench
    source, analyzer = open_driver("source1"), open_driver("analyzer")
    source.set_tone(2.4e9, -20.0)
    source.rf_on()
    analyzer.prepare()
    analyzer.apply(SETUP)
    # The marker query stalls past the timeout and its reply comes late: a naive retry would
    # read that late reply, and every later query would get the answer of the one before.
    schedule.add(FaultSpec(instrument="analyzer", kind="stall", on="CALC:MARK1:Y?",
                           duration_s=1.5 * QUERY_TIMEOUT_S, late_reply=True))
    reading = analyzer.read_markers(2.4e9, [2.4e9])
    retries = [event for event in events if event.kind == "retry"]
    assert retries and any(event.details["discarded"] for event in retries)
    assert analyzer.instrument.epoch == 0  # recovered on the same connection
    # In step: the tone reads back at its level at the analyzer (a power, not a sweep time).
    again = analyzer.read_markers(2.4e9, [2.4e9])
    assert abs(again.powers_dbm[0] - reading.powers_dbm[0]) < 0.1
    assert analyzer.instrument.call("read_sweep_time") == pytest.approx(sim.bench.sweep_time_s())


def test_stall_longer_than_the_retries_ends_in_a_reconnect(bench):
    _sim, schedule, events, _sup, open_driver = bench
    analyzer = open_driver("analyzer")
    analyzer.prepare()
    analyzer.apply(SETUP)
    schedule.add(FaultSpec(instrument="analyzer", kind="stall", on="SWE:TIME?", duration_s=4 * QUERY_TIMEOUT_S,
                           late_reply=False))
    sweep_time_s = analyzer.instrument.call("read_sweep_time")
    assert sweep_time_s == pytest.approx(2.5 * SETUP.span_hz / SETUP.rbw_hz**2)  # design section 5
    assert "reconnect" in events.kinds()
    assert analyzer.instrument.epoch >= 1


def test_reboot_is_survived_and_every_setting_sent_again(bench):
    sim, schedule, events, _sup, open_driver = bench
    source, analyzer = open_driver("source2"), open_driver("analyzer")
    source.set_tone(2.45e9, -25.0)
    source.rf_on()
    analyzer.prepare()
    analyzer.apply(SETUP)
    schedule.add(FaultSpec(instrument="source2", kind="reboot", on="*OPC?"))
    schedule.add(FaultSpec(instrument="analyzer", kind="reboot", on="INIT:IMM"))
    source.set_tone(2.46e9, -24.0)
    analyzer.read_markers(2.46e9, [2.46e9])
    effective = sim.bench.source(2).effective
    assert (effective.freq_hz, effective.power_dbm, effective.rf_on) == (2.46e9, -24.0, True)
    state = sim.bench.analyzer
    assert (state.span_hz, state.rbw_hz, state.atten_db, state.continuous) == (10e3, 1e3, 20.0, False)
    assert [event.kind for event in events].count("reapplied") == 2


def test_scpi_error_on_a_setting_sends_the_settings_again(bench):
    sim, schedule, events, _sup, open_driver = bench
    source = open_driver("source1")
    schedule.add(FaultSpec(instrument="source1", kind="error", on="SOUR:POW", code=sim_scpi.SETTINGS_CONFLICT))
    source.set_tone(2.4e9, -21.0)
    assert sim.bench.source(1).effective.power_dbm == -21.0
    scpi_events = [event for event in events if event.kind == "scpi-error"]
    assert len(scpi_events) == 1 and "-221" in scpi_events[0].message


def test_lost_state_is_noticed_by_read_back_and_restored(bench, tmp_path):
    sim, schedule, _events, supervision, _open_driver = bench
    # A dialect without read_event_status: every setting is read back.
    text = (data_dir("drivers") / "generic-source.toml").read_text()
    path = tmp_path / "no-esr.toml"
    path.write_text("\n".join(line for line in text.splitlines() if not line.startswith("read_event_status")))
    dialect = load_dialect(str(path))
    source = SignalSource(ScpiInstrument(open_resource(sim.resources["source1"], dialect, "source1"), dialect,
                                         "source1", supervision))
    source.set_tone(2.4e9, -20.0)
    source.rf_on()
    assert source.state_lost() is None
    # A front-panel preset: the connection stays, the state goes.
    schedule.add(FaultSpec(instrument="source1", kind="reboot", on="SOUR:FREQ?", keep_connection=True))
    lost = source.state_lost()
    assert lost is not None and "RF off, expected on" in lost and "power -30.00 dBm" in lost
    source.restore()
    assert source.state_lost() is None
    effective = sim.bench.source(1).effective
    assert (effective.power_dbm, effective.rf_on) == (-20.0, True)


def test_a_power_cycle_or_a_preset_is_told_by_two_queries(bench):
    """The shipped source dialect reads the event status register: its power-on bit tells a
    switched-off-and-on source (reading it clears it), the RF state a front-panel preset."""
    sim, schedule, _events, _sup, open_driver = bench
    source = open_driver("source1")
    source.clear_status()  # as a run starts
    source.set_tone(2.4e9, -20.0)
    source.rf_on()
    assert source.state_lost() is None
    schedule.add(FaultSpec(instrument="source1", kind="reboot", on="*ESR?", keep_connection=True))
    sent_before = len(sim.bench.command_log)
    lost = source.state_lost()
    assert lost is not None and "power-on bit set" in lost
    assert [line for _, who, line in sim.bench.command_log[sent_before:] if who == "source1"] == ["*ESR?", "OUTP?"]
    source.restore()
    assert source.state_lost() is None  # read once, cleared; RF on again
    sent_before = len(sim.bench.command_log)
    sim.bench.reset_source(1)  # a front-panel preset (*RST): RF off, the power-on bit clear
    assert "RF off, expected on (preset?)" in source.state_lost()
    assert [line for _, who, line in sim.bench.command_log[sent_before:] if who == "source1"] == ["*ESR?", "OUTP?"]


def test_gives_up_after_the_policy_and_says_so(bench):
    sim, _schedule, events, _sup, open_driver = bench
    source = open_driver("source1")
    sim.switch_off("source1")
    started = time.monotonic()
    with pytest.raises(InstrumentError, match="gave up after .* retries and 3 reconnects"):
        source.set_tone(2.4e9, -20.0)
    assert time.monotonic() - started < 10 * QUERY_TIMEOUT_S + 1.0
    assert events.kinds()[-1] == "gave-up"


def test_a_different_instrument_after_reopening_is_an_error(tmp_path):
    sim_bench = start_sim_bench(Scenario())
    try:
        dialect = fast_dialect(tmp_path, "generic-source")
        resource = sim_bench.resources["source1"]
        inst = ScpiInstrument(open_resource(resource, dialect, "source1"), dialect, "source1", Supervision(FAST))
        source = SignalSource(inst)
        assert "SIM-SRC-0001" in inst.idn
        port = int(resource.split("::")[2])
        sim_bench.switch_off("source1")
        # Someone plugged another source into the same address.
        with InstrumentServer(SimSource(sim_bench.bench, 2), sim_bench.bench.lock, port=port):
            with pytest.raises(IdentityChanged, match="SIM-SRC-0002"):
                source.set_tone(2.4e9, -20.0)
    finally:
        sim_bench.close()


def test_stop_request_cuts_a_backoff_short_and_refuses_rf_on(bench, tmp_path):
    sim, _schedule, _events, supervision, open_driver = bench
    source = open_driver("source1")
    supervision.policy = RetryPolicy(retries=0, reconnects=3, backoff_s=30.0, max_backoff_s=30.0)
    sim.switch_off("source1")
    threading.Timer(0.2, supervision.stop.set).start()
    started = time.monotonic()
    with pytest.raises(RecoveryStopped):
        source.set_tone(2.4e9, -20.0)
    assert time.monotonic() - started < 5.0
    with pytest.raises(InstrumentError, match="RF on refused"):
        source.rf_on()


def test_analyzer_preset_is_noticed_from_the_sweep_time_and_the_read_taken_again(bench):
    sim, schedule, events, _sup, open_driver = bench
    source, analyzer = open_driver("source1"), open_driver("analyzer")
    source.set_tone(2.4e9, -20.0)
    source.rf_on()
    analyzer.prepare()
    analyzer.apply(SETUP)
    before = analyzer.read_markers(2.4e9, [2.4e9])
    # A front-panel preset just before the next sweep: the connection stays, the settings go.
    schedule.add(FaultSpec(instrument="analyzer", kind="reboot", on="INIT:IMM", keep_connection=True))
    after = analyzer.read_markers(2.4e9, [2.4e9])
    assert "state-lost" in events.kinds()
    state = sim.bench.analyzer
    assert (state.span_hz, state.rbw_hz, state.atten_db, state.continuous) == (10e3, 1e3, 20.0, False)
    assert after.sweep_time_s == before.sweep_time_s
    assert abs(after.powers_dbm[0] - before.powers_dbm[0]) < 0.1  # read with the right settings
