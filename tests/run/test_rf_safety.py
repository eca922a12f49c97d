"""RF safety pieces on the simulated bench: the watchdog, RF off from another thread, the power
guard on every source command. RF state is asserted from the simulator itself."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time

import pytest
import pyvisa
from conftest import SAMPLE_RUNS
from sim_runs import rf_is_off, write_bench, write_plan
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session
from stored_rows import count_points, stored

from tonebench.errors import InputError
from tonebench.instruments import SignalSource, load_dialect, open_resource
from tonebench.instruments.scpi import LimitError, ScpiInstrument
from tonebench.instruments.supervision import RetryPolicy, Supervision
from tonebench.run.start import execute_run
from tonebench.run.watchdog import Watchdog, WatchdogTripped
from tonebench.store.models import Run


def open_source(sim, role: str) -> SignalSource:
    dialect = load_dialect("generic-source")
    inst = ScpiInstrument(open_resource(sim.resources[role], dialect, role), dialect, role,
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


# --- whole runs -------------------------------------------------------------------------------------

def test_sigterm_to_a_run_process_leaves_rf_off_on_the_instruments(tmp_path):
    """The simulator runs in a process of its own, like hardware, so its state outlives the run."""
    # Started as a shell starts a background job, with SIGINT ignored: it must still stop on SIGTERM.
    server = subprocess.Popen([sys.executable, "-m", "tonebench", "sim", "serve", "--bench", str(SAMPLE_RUNS / "sim_bench.toml")],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                              preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_IGN))
    try:
        resources = {}
        while "analyzer" not in resources or "source2" not in resources or "source1" not in resources:
            line = server.stdout.readline()
            assert line, server.stderr.read()
            role, _, resource = line.strip().partition(": ")
            if resource.startswith("TCPIP"):
                resources[role] = resource
        hardware = (SAMPLE_RUNS / "sim_bench.toml").read_text().split("[simulation]")[0]
        for role, resource in resources.items():
            if role in ("source1", "source2", "analyzer"):
                hardware = hardware.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "{resource}"\n')
        bench = tmp_path / "bench.toml"
        bench.write_text(hardware)
        db_path = tmp_path / "t.db"
        run = subprocess.Popen([sys.executable, "-m", "tonebench", "run", str(SAMPLE_RUNS / "demo_plan.toml"),
                                "--bench", str(bench), "--db", f"sqlite:///{db_path}"],
                               stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        deadline = time.monotonic() + 120
        while count_points(db_path) < 4:
            assert run.poll() is None and time.monotonic() < deadline
            threading.Event().wait(0.01)
        os.kill(run.pid, signal.SIGTERM)
        run.wait(60)
        assert run.returncode != 0
        rm = pyvisa.ResourceManager("@py")
        for role in ("source1", "source2"):
            inst = rm.open_resource(resources[role], read_termination="\n", write_termination="\n", timeout=5000)
            assert inst.query("OUTP?") == "0", role  # asked of the instrument itself
            inst.close()
        status, end_reason, _points, keys, _events = stored(db_path)
        assert status == "aborted" and "SIGTERM" in end_reason and len(keys) >= 4
    finally:
        # SIGTERM, not SIGINT: a process started in the background ignores SIGINT.
        server.terminate()
        try:
            server.wait(30)
        except subprocess.TimeoutExpired:
            server.kill()
            server.wait(30)
            raise AssertionError("the simulator server did not stop on SIGTERM within 30 s") from None
    assert server.returncode == 0, server.stderr.read()  # it stopped cleanly, by its own handler


def test_watchdog_switches_rf_off_while_the_run_is_stuck(tmp_path):
    """The analyzer stops answering for longer than the watchdog allows: RF goes off while the
    run's thread is still busy retrying, and the run ends aborted with the reason."""
    stall_s = 4.0
    bench = write_bench(tmp_path, unattended={"watchdog_s": 1.0},
                        faults=[{"instrument": "analyzer", "kind": "stall", "on": "CALC:MARK1:Y?", "nth": 12,
                                 "duration_s": stall_s}])
    sims, rf_off_at = [], []

    def watch_rf(sim) -> None:
        sims.append(sim)

        def poll() -> None:
            while not sim.faults.fired:
                threading.Event().wait(0.01)
            while any(sim.bench.source(i).commanded.rf_on for i in (1, 2)):
                threading.Event().wait(0.01)
            rf_off_at.append(time.monotonic())

        threading.Thread(target=poll, daemon=True).start()

    outcome = execute_run(write_plan(tmp_path), bench, f"sqlite:///{tmp_path / 't.db'}", None, None, watch_rf)
    assert outcome.status == "aborted"
    fired_at = sims[0].faults.fired[0].at_s
    assert rf_off_at and rf_off_at[0] < fired_at + stall_s - 0.5  # off before the stall ended
    assert rf_is_off(sims[0])
    status, end_reason, _points, _keys, events = stored(tmp_path / "t.db")
    assert status == "aborted" and "watchdog" in end_reason
    assert any(kind == "watchdog" and "RF off" in message for kind, message in events)


def test_plan_over_a_limit_is_refused_before_rf_goes_on(tmp_path):
    hot = write_plan(tmp_path, (SAMPLE_RUNS / "demo_plan.toml").read_text().replace("tone_stop_dbm = -8.0", "tone_stop_dbm = 4.0"))
    sims = []
    db_path = tmp_path / "t.db"
    with pytest.raises(InputError) as refused:
        execute_run(hot, write_bench(tmp_path), f"sqlite:///{db_path}", None, None, sims.append)
    message = str(refused.value)
    assert "\n" not in message and "max_tone_dbm" in message and "+2.00 dBm per tone" in message  # the first point over
    assert not [line for _, _, line in sims[0].bench.command_log if line.startswith("OUTP ON")]
    assert not [line for _, _, line in sims[0].bench.command_log if line.startswith("SOUR:POW")]
    if db_path.exists():
        engine = create_engine(f"sqlite:///{db_path}")
        with Session(engine) as session:
            assert session.scalars(select(Run)).all() == []
        engine.dispose()


def test_cli_refuses_a_plan_over_a_limit_in_one_line(tmp_path):
    from typer.testing import CliRunner

    from tonebench.cli import app

    hot = write_plan(tmp_path, (SAMPLE_RUNS / "demo_plan.toml").read_text().replace("tone_stop_dbm = -8.0", "tone_stop_dbm = 4.0"))
    result = CliRunner().invoke(app, ["run", str(hot), "--bench", str(SAMPLE_RUNS / "sim_bench.toml"),
                                      "--db", f"sqlite:///{tmp_path / 't.db'}"])
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: plan ") and "max_tone_dbm is 0.00 dBm" in lines[0]
