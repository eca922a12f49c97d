"""RF off on every way out, asserted on the instruments themselves.

The simulated instruments are served from this test process (start_sim_bench) and tonebench runs
in a process of its own against a hardware bench file that names their TCPIP resources, so each
source's RF state can be read after that process has ended: from the simulator's own state and
over a separate SCPI connection (OUTP?). Each test asserts the exit code, the one line printed,
what was stored, and both sources' RF state.

Signals are sent once RF is on at both sources (or, for calibration, once the command sits in a
read with a source on, held there by a stall fault), several of them inside 10 ms.
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import pytest
import pyvisa
from conftest import SAMPLE_RUNS
from sim_runs import BENCH_TEXT, PLAN_TEXT, fast_dialects, write_bench, write_plan
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session

from tonebench.config.bench_file import load_bench
from tonebench.sim.faults import FaultSpec
from tonebench.sim.launch import start_sim_bench
from tonebench.store.models import CalibrationSet, Event, Point, Run

SHORT_PLAN = PLAN_TEXT.replace("center_freqs_hz = [2.40e9, 2.45e9, 2.48e9]", "center_freqs_hz = [2.45e9]")
WAIT_S = 120.0  # generous bound for anything awaited (2 shared cores)


@dataclass
class Lab:
    sim: object
    bench_path: Path
    folder: Path

    @property
    def db_url(self) -> str:
        return f"sqlite:///{self.folder / 't.db'}"

    def start(self, *args: str) -> subprocess.Popen:
        return subprocess.Popen([sys.executable, "-m", "tonebench", *args], cwd=self.folder, text=True,
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def hardware_bench(folder: Path, resources: dict[str, str], *, power_meter: bool = False, fast: bool = False,
                   unattended: dict | None = None) -> Path:
    """The sample bench without its [simulation] table, its instruments at the given resources."""
    text = BENCH_TEXT.split("[simulation]")[0]
    if fast:
        for name, path in fast_dialects(folder).items():
            text = text.replace(f'dialect = "{name}"', f'dialect = "{path}"')
    if power_meter:
        text += '\n[instruments.power_meter]\ndialect = "generic-power-meter"\n'
    for role in ("source1", "source2", "analyzer", "power_meter"):
        text = text.replace(f"[instruments.{role}]\n", f'[instruments.{role}]\nresource = "{resources[role]}"\n')
    settings = {"backoff_s": 0.01, **(unattended or {})}
    text += "\n[unattended]\n" + "".join(f"{key} = {value!r}\n" for key, value in settings.items())
    path = folder / "bench.toml"
    path.write_text(text.replace("'", '"'))
    return path


def make_lab(folder: Path, **bench_options):
    scenario = load_bench(SAMPLE_RUNS / "sim_bench.toml").scenario
    sim = start_sim_bench(scenario)
    return Lab(sim, hardware_bench(folder, sim.resources, **bench_options), folder)


@pytest.fixture
def lab(tmp_path):
    made = make_lab(tmp_path)
    yield made
    made.sim.close()


def rf_states(sim) -> list[bool]:
    """Each source's RF state, from the simulator and, over a connection of its own, the source's
    RF query; both must agree."""
    from_sim = [sim.bench.source(i).effective.rf_on or sim.bench.source(i).commanded.rf_on for i in (1, 2)]
    rm = pyvisa.ResourceManager("@py")
    from_scpi = []
    for role in ("source1", "source2"):
        inst = rm.open_resource(sim.resources[role], read_termination="\n", write_termination="\n", timeout=20000)
        from_scpi.append(inst.query("OUTP?").strip() in ("1", "ON"))
        inst.close()
    assert from_sim == from_scpi
    return from_scpi


def wait_for(condition, proc: subprocess.Popen | None = None, what: str = "") -> None:
    """Poll a condition of the simulator (bounded); the process must still be running meanwhile."""
    deadline = time.monotonic() + WAIT_S
    while not condition():
        if proc is not None and proc.poll() is not None:
            raise AssertionError(f"process ended before {what}: {proc.returncode} {proc.communicate()}")
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        threading.Event().wait(0.002)


def both_on(sim) -> bool:
    return all(sim.bench.source(i).effective.rf_on for i in (1, 2))


def send_burst(pid: int, signum: int, count: int) -> float:
    """`count` signals about 0.5 ms apart; returns the time from the first to the last (s)."""
    first_s = time.perf_counter()
    for index in range(count):
        while time.perf_counter() - first_s < 0.0005 * index:
            pass  # spacing, not synchronisation: distinct deliveries within 10 ms
        os.kill(pid, signum)
    # Not asserted: a loaded machine may preempt this loop and spread the signals further, and the
    # cleanup must hold either way (five are 2 ms apart by design).
    return time.perf_counter() - first_s


def finish(proc: subprocess.Popen) -> tuple[int, str, str]:
    stdout, stderr = proc.communicate(timeout=WAIT_S)
    return proc.returncode, stdout, stderr


def lines_of(text: str) -> list[str]:
    return [line for line in text.splitlines() if line.strip()]


def stored_run(db_url: str):
    engine = create_engine(db_url)
    with Session(engine) as session:
        run = session.scalars(select(Run)).one()
        events = [(e.kind, e.message) for e in session.scalars(select(Event).where(Event.run_id == run.id))]
        points = {p.point_key: p.status for p in session.scalars(select(Point).where(Point.run_id == run.id))}
        result = run.guid, run.status, run.end_reason, events, points
    engine.dispose()
    return result


# --- runs ----------------------------------------------------------------------------------------

def test_normal_end_says_rf_off_read_back(lab):
    proc = lab.start("run", str(write_plan(lab.folder)), "--bench", str(lab.bench_path), "--db", lab.db_url)
    code, stdout, _stderr = finish(proc)
    assert code == 0, _stderr
    guid, status, reason, events, _points = stored_run(lab.db_url)
    assert f"run {guid}: complete: all 51 points measured" in stdout
    assert "RF off at source1, source2 (read back)" in lines_of(stdout)
    assert status == "complete"
    assert ("rf-off", "RF off at source1, source2 (read back)") in events
    assert rf_states(lab.sim) == [False, False]


def test_instrument_failure_aborts_with_rf_off(tmp_path):
    lab = make_lab(tmp_path, unattended={"on_point_failure": "abort", "reconnects": 1, "retries": 0})
    try:
        proc = lab.start("run", str(write_plan(lab.folder)), "--bench", str(lab.bench_path), "--db", lab.db_url)
        wait_for(lambda: both_on(lab.sim), proc, "RF on")
        lab.sim.switch_off("analyzer")  # the analyzer goes away mid-run
        code, stdout, stderr = finish(proc)
        assert code == 1, stderr
        guid, status, reason, _events, _points = stored_run(lab.db_url)
        assert status == "aborted" and reason.startswith("aborted at point")
        assert f"run {guid}: aborted: aborted at point" in stdout
        assert "RF off at source1, source2 (read back)" in lines_of(stdout)
        assert rf_states(lab.sim) == [False, False]
    finally:
        lab.sim.close()


def test_a_source_that_will_not_switch_off_is_named_stored_and_exits_1(tmp_path):
    """source2 refuses RF off from the end of the run on (an SCPI error, the command not executed):
    retried for rf_off_s, then named in one loud line, in an event and in the run's end reason."""
    lab = make_lab(tmp_path, unattended={"rf_off_s": 1.0})
    try:
        # The first RF off (on connecting) goes through; every later one is refused.
        lab.sim.faults.add(FaultSpec(instrument="source2", kind="error", on="OUTP OFF", nth=2, repeat=1000000,
                                     code=-221))
        proc = lab.start("run", str(write_plan(lab.folder, SHORT_PLAN)), "--bench", str(lab.bench_path),
                         "--db", lab.db_url)
        code, stdout, stderr = finish(proc)
        assert code == 1, stderr
        loud = [line for line in lines_of(stderr) if line.startswith("DANGER: ")]
        assert len(loud) == 1 and loud[0].startswith(
            "DANGER: RF off at source1 (read back); RF NOT CONFIRMED OFF at source2 (")
        assert "RF off at source1, source2" not in stdout + stderr
        _guid, status, reason, events, _points = stored_run(lab.db_url)
        assert status == "complete" and "RF NOT CONFIRMED OFF at source2" in reason
        assert any(kind == "rf-not-off" and "source2" in message for kind, message in events)
        assert rf_states(lab.sim) == [False, True]  # what was said is what the instrument shows
    finally:
        lab.sim.close()


def test_watchdog_trip_with_a_source_stalled_beyond_rf_off_s_says_so_loudly(tmp_path):
    """source1 stalls far longer than rf_off_s: RF off cannot be read back, and the command says
    which source, stores it with the run and exits 1 (the issue's watchdog case)."""
    lab = make_lab(tmp_path, fast=True, unattended={"watchdog_s": 1.0, "rf_off_s": 1.0})
    try:
        lab.sim.faults.add(FaultSpec(instrument="source1", kind="stall", on="SOUR:POW", nth=12, duration_s=120.0))
        proc = lab.start("run", str(write_plan(lab.folder)), "--bench", str(lab.bench_path), "--db", lab.db_url)
        code, stdout, stderr = finish(proc)
        assert code == 1, stderr
        loud = [line for line in lines_of(stderr) if line.startswith("DANGER: ")]
        assert len(loud) == 1 and loud[0].startswith(
            "DANGER: RF off at source2 (read back); RF NOT CONFIRMED OFF at source1 (source1: ")
        _guid, status, reason, events, _points = stored_run(lab.db_url)
        assert status == "aborted" and reason.startswith("watchdog: no progress for")
        assert "RF NOT CONFIRMED OFF at source1" in reason
        assert any(kind == "rf-not-off" and "source1" in message for kind, message in events)
        # Still stalled, so asked of the simulator only: source1 is on, as the line said.
        assert lab.sim.bench.source(1).effective.rf_on and not lab.sim.bench.source(2).effective.rf_on
    finally:
        lab.sim.close()


@pytest.mark.parametrize("signum, count, code, said", [
    (signal.SIGINT, 1, 130, "interrupted by Ctrl-C"),
    (signal.SIGINT, 5, 130, "interrupted by Ctrl-C"),
    (signal.SIGTERM, 1, 143, "terminated by SIGTERM"),
    (signal.SIGTERM, 3, 143, "terminated by SIGTERM"),
], ids=["ctrl-c", "ctrl-c-x5", "sigterm", "sigterm-x3"])
def test_signals_during_a_run(lab, signum, count, code, said):
    proc = lab.start("run", str(write_plan(lab.folder)), "--bench", str(lab.bench_path), "--db", lab.db_url)
    wait_for(lambda: both_on(lab.sim), proc, "RF on")
    send_burst(proc.pid, signum, count)
    returncode, _stdout, stderr = finish(proc)
    guid, status, reason, events, _points = stored_run(lab.db_url)
    assert returncode == code, stderr
    assert lines_of(stderr)[-1] == (f"{said}: RF off at source1, source2 (read back); run {guid[:8]} stored as "
                                    f"aborted; `tonebench resume {guid[:8]}` continues it")
    assert "Traceback" not in stderr
    assert status == "aborted" and reason == said
    assert rf_states(lab.sim) == [False, False]


@pytest.mark.parametrize("stalled", ["analyzer", "source1"])
def test_watchdog_trip_with_a_stalled_instrument(tmp_path, stalled):
    """The stalled instrument answers again after stall_s: a source that stalled is off once it does."""
    stall_s = 3.0
    lab = make_lab(tmp_path, fast=True, unattended={"watchdog_s": 1.0})
    try:
        line = {"analyzer": "CALC:MARK1:Y?", "source1": "SOUR:POW"}[stalled]
        lab.sim.faults.add(FaultSpec(instrument=stalled, kind="stall", on=line, nth=12, duration_s=stall_s))
        proc = lab.start("run", str(write_plan(lab.folder)), "--bench", str(lab.bench_path), "--db", lab.db_url)
        code, stdout, stderr = finish(proc)
        assert lab.sim.faults.fired, "the stall never happened"
        guid, status, reason, events, _points = stored_run(lab.db_url)
        assert code == 1, stderr
        assert status == "aborted" and reason.startswith("watchdog: no progress for")
        assert f"run {guid}: aborted: watchdog: no progress for" in stdout
        assert "RF off at source1, source2 (read back)" in lines_of(stdout)
        # For a stalled source, RF off can only be read back once it answers again, after its stall.
        assert any(kind == "watchdog" and message.endswith("RF off at source1, source2 (read back)")
                   for kind, message in events), events
        assert rf_states(lab.sim) == [False, False]
    finally:
        lab.sim.close()


def test_sigterm_three_times_to_a_queue_worker(lab):
    from tonebench.queue.jobs import add_job
    from tonebench.store.database import open_database, session_factory
    from tonebench.store.models import Job

    engine = open_database(lab.db_url)
    add_job(session_factory(engine), write_plan(lab.folder), lab.bench_path)
    proc = lab.start("worker", "--bench", str(lab.bench_path), "--db", lab.db_url, "--until-empty")
    wait_for(lambda: both_on(lab.sim), proc, "RF on")
    send_burst(proc.pid, signal.SIGTERM, 3)
    code, _stdout, stderr = finish(proc)
    guid, status, reason, _events, _points = stored_run(lab.db_url)
    assert code == 143, stderr
    assert lines_of(stderr)[-1] == (f"worker stopped; terminated by SIGTERM: RF off at source1, source2 (read back); "
                                    f"run {guid[:8]} stored as aborted; `tonebench resume {guid[:8]}` continues it")
    assert status == "aborted" and reason == "terminated by SIGTERM"
    with session_factory(engine)() as session:
        assert session.scalars(select(Job.status)).one() == "failed"
    engine.dispose()
    assert rf_states(lab.sim) == [False, False]


def test_sigterm_to_an_idle_worker_ends_it_with_sigterms_code(lab):
    proc = lab.start("worker", "--bench", str(lab.bench_path), "--db", lab.db_url, "--poll-s", "60")
    lock = lab.folder / "t.db.worker-lock"
    wait_for(lambda: lock.exists() and lock.read_text().strip(), proc, "the worker's lock")  # it is idle now
    send_burst(proc.pid, signal.SIGTERM, 3)
    code, stdout, stderr = finish(proc)
    assert code == 143, stderr
    (line,) = lines_of(stdout)
    assert re.fullmatch(r"\d{4}-\d\d-\d\d \d\d:\d\d:\d\dZ worker for bench sim-bench-1: 0 job\(s\) run", line), line
    assert lines_of(stderr) == ["worker stopped by SIGTERM between runs"]
    assert rf_states(lab.sim) == [False, False]


def test_kill_9_then_the_next_command_switches_rf_off_first(lab):
    proc = lab.start("run", str(write_plan(lab.folder)), "--bench", str(lab.bench_path), "--db", lab.db_url)
    wait_for(lambda: both_on(lab.sim), proc, "RF on")
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=WAIT_S)
    assert rf_states(lab.sim) == [True, True]  # what software cannot cover: left on by the kill
    guid = stored_run(lab.db_url)[0]
    log_from = len(lab.sim.bench.command_log)
    code, stdout, stderr = finish(lab.start("resume", guid[:8], "--db", lab.db_url))
    assert code == 0, stderr
    warned = [line for line in lines_of(stderr) if line.startswith("warning: source")]
    assert len(warned) == 2 and "was found with RF on" in warned[0] and "switched off (read back)" in warned[0]
    _guid, status, _reason, events, _points = stored_run(lab.db_url)
    assert status == "complete"
    assert sum(1 for kind, _ in events if kind == "rf-found-on") == 2
    # The first RF command each source got from the next command was RF off, before any power setting.
    for role in ("source1", "source2"):
        lines = [line for _, who, line in lab.sim.bench.command_log[log_from:] if who == role]
        first_rf = next(i for i, line in enumerate(lines) if line.startswith("OUTP "))
        assert lines[first_rf] == "OUTP OFF"
        assert not any(line.startswith("SOUR:POW") for line in lines[:first_rf])
    assert rf_states(lab.sim) == [False, False]


# --- calibration commands -----------------------------------------------------------------------

def _import_set(lab: Lab, name: str, paths: tuple[str, ...]) -> None:
    from tonebench.calibration.workflow import import_tables

    files = {}
    for path in paths:
        csv = lab.folder / f"{path}.csv"
        csv.write_text("freq_hz,loss_db\n2.3e9,6.5\n2.6e9,6.8\n")
        files[path] = csv
    import_tables(lab.db_url, name, files)


CALIBRATIONS = {
    # command, what a set must hold first, the stall that holds it inside a read with RF on
    "measure-input": ((), ("power_meter", "FETC?")),
    "measure-output": (("in1", "in2"), ("analyzer", "CALC:MARK1:Y?")),
    "measure-residual": (("in1", "in2", "out"), ("analyzer", "CALC:MARK1:Y?")),
}


@pytest.mark.parametrize("signum, count, code, said", [
    (signal.SIGINT, 1, 130, "interrupted by Ctrl-C"),
    (signal.SIGINT, 5, 130, "interrupted by Ctrl-C"),
    (signal.SIGTERM, 1, 143, "terminated by SIGTERM"),
    (signal.SIGTERM, 3, 143, "terminated by SIGTERM"),
], ids=["ctrl-c", "ctrl-c-x5", "sigterm", "sigterm-x3"])
@pytest.mark.parametrize("command", list(CALIBRATIONS))
def test_signals_during_calibration(tmp_path, command, signum, count, code, said):
    lab = make_lab(tmp_path, power_meter=True)
    try:
        needs, (stalled, line) = CALIBRATIONS[command]
        name = "input-set" if not needs else "known-paths"
        if needs:
            _import_set(lab, name, needs)
        if command != "measure-input":
            with lab.sim.bench.lock:
                lab.sim.bench.set_thru(True)
        lab.sim.faults.add(FaultSpec(instrument=stalled, kind="stall", on=line, nth=1, duration_s=60.0))
        args = ["cal", command, name, "--bench", str(lab.bench_path), "--plan", str(write_plan(lab.folder)),
                "--db", lab.db_url] + ([] if command == "measure-input" else ["--thru-in-place"])
        proc = lab.start(*args)
        wait_for(lambda: bool(lab.sim.faults.fired), proc, "the stalled read")
        assert any(rf_states(lab.sim))  # a source is on while the command waits
        send_burst(proc.pid, signum, count)
        returncode, _stdout, stderr = finish(proc)
        assert returncode == code, stderr
        assert lines_of(stderr)[-1] == f"{said}: RF off at source1, source2 (read back); calibration not stored"
        assert "Traceback" not in stderr
        engine = create_engine(lab.db_url)
        with Session(engine) as session:  # nothing half-written: the set is as it was before
            sets = session.scalars(select(CalibrationSet)).all()
            assert [s.name for s in sets] == ([name] if needs else [])
            if command == "measure-residual":
                assert not sets[0].residuals
        engine.dispose()
        assert rf_states(lab.sim) == [False, False]
    finally:
        lab.sim.close()


# --- truthful outcomes (exit codes 1 and 4) ------------------------------------------------------


def _cli(*args: str):
    from typer.testing import CliRunner

    from tonebench.cli import app

    return CliRunner().invoke(app, [str(arg) for arg in args])


def test_a_run_whose_every_point_failed_is_failed_with_exit_1(tmp_path):
    bench = write_bench(tmp_path, unattended={"point_attempts": 1}, faults=[
        {"instrument": "analyzer", "kind": "error", "on": "CALC:MARK1:Y?", "repeat": 1000000, "code": -222}])
    db_url = f"sqlite:///{tmp_path / 't.db'}"
    result = _cli("run", write_plan(tmp_path, SHORT_PLAN), "--bench", bench, "--db", db_url)
    guid, status, reason, _events, points = stored_run(db_url)
    assert result.exit_code == 1, result.output
    assert f"run {guid}: failed: no point measured: all 17 failed" in result.output
    assert "RF off at source1, source2 (read back)" in result.output
    assert status == "failed" and reason.startswith("no point measured: all 17 failed")
    assert len(points) == 17 and set(points.values()) == {"failed"}
    assert not list(tmp_path.glob("report-*.html"))  # nothing to report


def test_a_run_with_failed_points_is_failed_with_exit_4_and_resume_measures_them(tmp_path):
    attempts = 2
    bench = write_bench(tmp_path, unattended={"point_attempts": attempts}, faults=[
        # The error queue is read once per point's reads: the fault lasts through both attempts'
        # six marker reads (two tones, two products each with its noise marker).
        {"instrument": "analyzer", "kind": "error", "on": "CALC:MARK1:Y?", "nth": 1, "repeat": 6 * attempts, "code": -222}])
    db_url = f"sqlite:///{tmp_path / 't.db'}"
    result = _cli("run", write_plan(tmp_path, SHORT_PLAN), "--bench", bench, "--db", db_url)
    guid, status, reason, _events, points = stored_run(db_url)
    assert result.exit_code == 4, result.output
    assert f"run {guid}: failed: 16 of 17 points measured, 1 failed" in result.output
    assert status == "failed" and reason.startswith("16 of 17 points measured, 1 failed")
    assert list(points.values()).count("failed") == 1
    assert "report:" in result.output and list(tmp_path.glob("report-*.html"))  # the measured ones analysed
    listed = _cli("runs", "--db", db_url)
    assert listed.exit_code == 0 and "failed" in listed.output
    shown = _cli("show", guid[:8], "--db", db_url)
    assert shown.exit_code == 0 and "status:  failed (16 of 17 points measured, 1 failed" in shown.output
    healthy = tmp_path / "healthy"  # the same bench, its fault gone
    healthy.mkdir()
    again = _cli("resume", guid[:8], "--db", db_url, "--bench", write_bench(healthy))
    assert again.exit_code == 0, again.output
    _guid, status, reason, _events, points = stored_run(db_url)
    assert status == "complete" and reason == "all 17 points measured"
    assert set(points.values()) == {"measured"} and len(points) == 17


# --- the guard itself (in this process, signals raised in the main thread) -------------------------

class FakeSource:
    """A source that raises `error` on RF off `fails` times, then reads back off."""

    def __init__(self, label: str, fails: int = 0, error: BaseException | None = None):
        self.label, self.fails, self.error, self.calls, self.on = label, fails, error, 0, True

    def rf_off(self) -> None:
        self.calls += 1
        if self.calls <= self.fails:
            raise self.error
        self.on = False

    force_rf_off = rf_off

    def rf_is_on(self) -> bool:
        return self.on


def test_every_source_is_tried_even_when_one_raises_a_base_exception():
    from tonebench.instruments.rf_guard import switch_rf_off

    first = FakeSource("source1", fails=1, error=KeyboardInterrupt())
    second = FakeSource("source2")
    report = switch_rf_off([first, second], budget_s=5.0)
    assert second.calls == 1 and not second.on  # tried although source1 raised
    assert report.ok and report.confirmed == ["source1", "source2"] and first.calls == 2
    assert report.line() == "RF off at source1, source2 (read back)"
    stuck = FakeSource("source2", fails=10**6, error=RuntimeError("no reply"))
    report = switch_rf_off([FakeSource("source1"), stuck], budget_s=0.3)
    assert not report.ok and stuck.calls >= 2  # retried until the time allowed was spent
    assert report.line() == ("RF off at source1 (read back); RF NOT CONFIRMED OFF at source2 (source2: no reply); "
                             "switch it off at the instrument")


def test_later_signals_cannot_interrupt_the_cleanup_and_a_shielded_one_comes_after():
    from tonebench.instruments.rf_guard import Terminated, shielded, stop_signals

    before = {sig: signal.getsignal(sig) for sig in (signal.SIGINT, signal.SIGTERM)}
    cleaned = []
    with stop_signals():
        with pytest.raises(KeyboardInterrupt):
            try:
                signal.raise_signal(signal.SIGINT)
            finally:
                for _ in range(5):  # none of these may cut the cleanup short
                    signal.raise_signal(signal.SIGINT)
                    signal.raise_signal(signal.SIGTERM)
                cleaned.append("RF off")
    assert cleaned == ["RF off"]
    with stop_signals():
        with pytest.raises(Terminated):
            with shielded():
                signal.raise_signal(signal.SIGTERM)
                cleaned.append("closing record")  # still runs: the signal waits for the block
        assert cleaned[-1] == "closing record"
    assert {sig: signal.getsignal(sig) for sig in before} == before  # the handlers of before are back
