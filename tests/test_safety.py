"""RF safety pieces on the simulated bench: the watchdog, RF off from another thread, the power
guard on every source command. RF state is asserted from the simulator itself."""

from __future__ import annotations

import threading
import time

import pytest

from tonebench.instruments import SignalSource, load_dialect, open_resource
from tonebench.instruments.scpi import LimitError, ScpiInstrument
from tonebench.instruments.supervision import RetryPolicy, Supervision
from tonebench.sim.launch import start_sim_bench
from tonebench.sim.scenario import Scenario
from tonebench.watchdog import Watchdog, WatchdogTripped


@pytest.fixture
def sim():
    with start_sim_bench(Scenario()) as running:
        yield running


def open_source(sim, role: str) -> SignalSource:
    dialect = load_dialect("generic-source")
    inst = ScpiInstrument(open_resource(sim.resources[role], dialect), dialect, role,
                          Supervision(RetryPolicy(backoff_s=0.01)))
    assert inst.idn
    return SignalSource(inst)


def test_watchdog_trips_once_without_progress_and_not_while_kicked():
    trips = []
    with Watchdog(0.2, trips.append) as kicked:
        deadline = time.monotonic() + 0.8
        while time.monotonic() < deadline:
            kicked.kick()
            threading.Event().wait(0.02)
        kicked.check()  # no trip while progress is made
    assert trips == []
    with Watchdog(0.2, trips.append) as idle:
        threading.Event().wait(0.8)
        with pytest.raises(WatchdogTripped, match="no progress for"):
            idle.check()
    assert len(trips) == 1 and "limit 0.2 s" in trips[0]


def test_force_rf_off_uses_a_second_connection_while_the_first_is_busy(sim):
    source = open_source(sim, "source1")
    source.set_tone(2.4e9, -20.0)
    source.rf_on()
    assert sim.bench.source(1).effective.rf_on
    holding, release = threading.Event(), threading.Event()

    def stuck_call() -> None:  # the run's thread, stuck inside a call on this source
        with source.instrument.io_lock:
            holding.set()
            release.wait(10)

    thread = threading.Thread(target=stuck_call)
    thread.start()
    holding.wait(5)
    try:
        how = source.force_rf_off(lock_wait_s=0.1)
        assert how == "through a second connection"
        channel = sim.bench.source(1)
        assert not channel.effective.rf_on and not channel.commanded.rf_on
    finally:
        release.set()
        thread.join()
    # Back on the first connection, the driver knows RF must stay off.
    assert source.wanted.rf_on is False and source.state_lost() is None


def test_force_rf_off_through_the_free_connection(sim):
    source = open_source(sim, "source2")
    source.set_tone(2.4e9, -20.0)
    source.rf_on()
    assert source.force_rf_off() == "through its connection"
    assert not sim.bench.source(2).effective.rf_on


def test_power_guard_refuses_before_anything_is_sent(sim):
    source = open_source(sim, "source1")

    def guard(label: str, freq_hz: float, power_dbm: float) -> None:
        if power_dbm > -10.0:
            raise LimitError(f"{label}: {power_dbm:.2f} dBm above the bench limit -10.00 dBm")

    source.power_guard = guard
    source.set_tone(2.4e9, -12.0)
    lines_before = len(sim.bench.command_log)
    with pytest.raises(LimitError, match="source1: -5.00 dBm above"):
        source.set_tone(2.4e9, -5.0)
    assert len(sim.bench.command_log) == lines_before  # refused before any line left
    assert sim.bench.source(1).commanded.power_dbm == -12.0
