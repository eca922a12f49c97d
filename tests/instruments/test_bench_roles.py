"""The right instrument behind each role, and one run per bench (issue 9, item 3).

Role checks: a hardware bench file whose resources point at simulated instruments started by the
test, wired wrongly on purpose; the simulator's own record shows RF never went on. The bench
hold: real processes racing on one SQLite file and on a real PostgreSQL server.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pyvisa
import sqlalchemy as sa
from conftest import SAMPLE_RUNS
from hardware_benches import hardware_bench, one_error_line
from sim_runs import rf_never_on, write_plan
from sqlalchemy import func, select
from sqlalchemy.orm import Session
from stored_rows import count_rows
from typer.testing import CliRunner

from tonebench.cli import app
from tonebench.sim.launch import start_sim_bench
from tonebench.sim.scenario import Scenario
from tonebench.store.models import CalibrationSet, Event, Run

SMALL_PLAN = (SAMPLE_RUNS / "demo_plan.toml").read_text().replace("[2.40e9, 2.45e9, 2.48e9]", "[2.45e9]").replace(
    "tone_start_dbm = -40.0", "tone_start_dbm = -30.0").replace("tone_stop_dbm = -8.0", "tone_stop_dbm = -26.0")
ANALYZER_IDN = "tonebench,simulated spectrum analyzer,SIM-SA-0001,0.1"
SOURCE_IDN = "tonebench,simulated two-tone source,SIM-SRC-0001,0.1"


def run_cli(tmp_path: Path, bench: Path):
    db_path = tmp_path / "t.db"
    result = CliRunner().invoke(app, ["run", str(write_plan(tmp_path, SMALL_PLAN)), "--bench", str(bench),
                                      "--db", f"sqlite:///{db_path}"])
    return result, db_path


def rewire(bench: Path, role: str, resource: str) -> None:
    lines = bench.read_text().splitlines()
    at = lines.index(f"[instruments.{role}]")
    lines[at + 1] = f'resource = "{resource}"'
    bench.write_text("\n".join(lines) + "\n")


# --- the simulated instruments answer foreign commands like real ones ------------------------------


def test_a_simulated_source_answers_an_analyzer_query_with_undefined_header(sim):
    """SCPI-1999 vol 2 ch. 21 (from memory): an unknown header queues -113 and sends no reply."""
    rm = pyvisa.ResourceManager("@py")
    for role, foreign in (("source1", "SWE:TIME?"), ("analyzer", "OUTP?"), ("power_meter", "SWE:TIME?")):
        inst = rm.open_resource(sim.resources[role], read_termination="\n", write_termination="\n", timeout=5000)
        try:
            inst.write(foreign)
            reply = inst.query("SYST:ERR?")  # the first line back is the error: the query got none
            assert reply.startswith("-113,") and "Undefined header" in reply, (role, reply)
        finally:
            inst.close()


# --- the instrument behind each role -----------------------------------------------------------------


def test_an_analyzer_where_a_source_is_expected_is_refused_in_one_line(tmp_path, sim):
    bench = hardware_bench(tmp_path, sim)
    rewire(bench, "source1", sim.resources["analyzer"])
    rewire(bench, "analyzer", sim.resources["source1"])
    result, db_path = run_cli(tmp_path, bench)
    assert result.exit_code == 2, result.output
    line = one_error_line(result)
    assert "instruments.source1" in line and ANALYZER_IDN in line and "is not a signal source" in line
    assert "read_rf ('OUTP?')" in line and "-113" in line
    assert count_rows(db_path, Run) == 0
    assert rf_never_on(sim)


def test_a_source_where_the_analyzer_is_expected_is_refused_in_one_line(tmp_path, sim):
    with start_sim_bench(Scenario()) as other:  # a third source, from a second simulated bench
        bench = hardware_bench(tmp_path, sim)
        rewire(bench, "analyzer", other.resources["source1"])
        result, db_path = run_cli(tmp_path, bench)
        assert result.exit_code == 2, result.output
        line = one_error_line(result)
        assert "instruments.analyzer" in line and SOURCE_IDN in line and "is not a spectrum analyzer" in line
        assert "read_sweep_time ('SWE:TIME?')" in line and "-113" in line
        assert count_rows(db_path, Run) == 0
        assert rf_never_on(sim) and rf_never_on(other)


def test_two_roles_on_one_resource_are_refused_before_anything_is_opened(tmp_path, sim):
    bench = hardware_bench(tmp_path, sim)
    rewire(bench, "source2", sim.resources["source1"].replace("TCPIP0::", "TCPIP::"))  # same, spelt otherwise
    result, db_path = run_cli(tmp_path, bench)
    assert result.exit_code == 2, result.output
    line = one_error_line(result)
    assert "instruments.source1 and instruments.source2 both use" in line and "an instrument of its own" in line
    assert count_rows(db_path, Run) == 0
    assert [line for _, _, line in sim.bench.command_log] == []  # refused before any instrument is opened
    assert rf_never_on(sim)


def test_one_instrument_behind_two_addresses_is_refused_by_its_identity(tmp_path, sim):
    bench = hardware_bench(tmp_path, sim)
    rewire(bench, "source2", sim.resources["source1"].replace("127.0.0.1", "localhost"))
    result, db_path = run_cli(tmp_path, bench)
    assert result.exit_code == 2, result.output
    line = one_error_line(result)
    assert "instruments.source1 and instruments.source2 are the same instrument" in line and SOURCE_IDN in line
    assert count_rows(db_path, Run) == 0
    assert rf_never_on(sim)


# --- one run per bench ---------------------------------------------------------------------------------

# A run in a process of its own that, once it holds the bench, waits at its first point until
# the test says so: the winner keeps the bench while the other is refused, whatever the timing.
RACER = r"""
import json, os, sys, threading
from pathlib import Path
from tonebench.errors import InputError
from tonebench.run.start import execute_run

plan, bench, db, folder = sys.argv[1:5]
folder = Path(folder)

def wait_for(name):
    while not (folder / name).exists():
        threading.Event().wait(0.005)

sims = []
def started(guid):  # written whole, then renamed: the test never reads half a GUID
    (folder / f"partial-{os.getpid()}").write_text(guid)
    os.replace(folder / f"partial-{os.getpid()}", folder / f"started-{os.getpid()}")

def hold(done, total):
    wait_for("release")

wait_for("go")
try:
    outcome = execute_run(Path(plan), Path(bench), db, None, hold, sims.append, on_run_started=started)
except InputError as exc:
    rf_sent = any(line.startswith("OUTP ON") for sim in sims for _, _, line in sim.bench.command_log)
    print(json.dumps({"refused": str(exc), "rf_on_sent": rf_sent}))
    sys.exit(2)
print(json.dumps({"status": outcome.status, "guid": outcome.guid}))
"""


def start_racer(tmp_path: Path, db_url: str) -> subprocess.Popen:
    plan = write_plan(tmp_path, SMALL_PLAN, "small.toml")
    return subprocess.Popen([sys.executable, "-c", RACER, str(plan), str(SAMPLE_RUNS / "sim_bench.toml"), db_url,
                             str(tmp_path)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=tmp_path)


def wait_until(condition, what: str, timeout_s: float = 120.0) -> None:
    deadline = time.monotonic() + timeout_s
    while not condition():
        assert time.monotonic() < deadline, f"gave up waiting for {what}"
        threading.Event().wait(0.01)


def runs_of(db_url: str) -> list[tuple[str, str]]:
    engine = sa.create_engine(db_url)
    try:
        with Session(engine) as session:
            return [(run.guid, run.status) for run in session.scalars(select(Run).order_by(Run.id))]
    finally:
        engine.dispose()


def test_two_runs_started_at_once_on_one_bench_exactly_one_runs(tmp_path, db_url):
    from tonebench.store.database import open_database

    open_database(db_url).dispose()  # the schema first: the race is for the bench, not the migration
    racers = [start_racer(tmp_path, db_url) for _ in range(2)]
    try:
        (tmp_path / "go").write_text("")  # both start at once
        wait_until(lambda: any(racer.poll() is not None for racer in racers), "one run to be refused")
        loser = next(racer for racer in racers if racer.poll() is not None)
        winner = next(racer for racer in racers if racer is not loser)
        out, err = loser.communicate(timeout=30)
        assert loser.returncode == 2, (out, err)
        said = json.loads(out)
        wait_until(lambda: (tmp_path / f"started-{winner.pid}").exists(), "the winner's run")
        guid = (tmp_path / f"started-{winner.pid}").read_text()
        message = said["refused"]
        assert "\n" not in message and "bench 'sim-bench-1' is in use by run" in message
        assert guid in message and f"pid {winner.pid}" in message and "host " in message
        assert not said["rf_on_sent"]  # the refused run never switched RF on
        assert runs_of(db_url) == [(guid, "running")], said  # no run row for the refused one
    finally:
        (tmp_path / "release").write_text("")
        for racer in racers:
            racer.wait(120)
    assert winner.returncode == 0, winner.stderr.read()
    assert runs_of(db_url) == [(guid, "complete")]


def test_a_killed_holder_does_not_block_the_next_run(tmp_path, db_url):
    from tonebench.store.database import open_database

    open_database(db_url).dispose()
    holder = start_racer(tmp_path, db_url)
    (tmp_path / "go").write_text("")
    try:
        wait_until(lambda: (tmp_path / f"started-{holder.pid}").exists(), "the holder's run")
        guid = (tmp_path / f"started-{holder.pid}").read_text()
        blocked = start_racer(tmp_path, db_url)  # while the holder lives: refused
        out, _ = blocked.communicate(timeout=120)
        assert blocked.returncode == 2 and guid in json.loads(out)["refused"]
    finally:
        os.kill(holder.pid, signal.SIGKILL)
        holder.wait(30)
    (tmp_path / "release").write_text("")  # the next run does not wait at its first point
    following = start_racer(tmp_path, db_url)
    out, err = following.communicate(timeout=120)
    assert following.returncode == 0, err
    second = json.loads(out)
    assert second["status"] == "complete"
    assert runs_of(db_url) == [(guid, "aborted"), (second["guid"], "complete")]
    engine = sa.create_engine(db_url)
    with Session(engine) as session:
        kinds = session.scalars(select(Event.kind).join(Run).where(Run.guid == guid)).all()
        assert "owner-gone" in kinds  # closed as aborted, with the reason, by the next run
        assert session.scalar(select(func.count()).select_from(Run)) == 2
    engine.dispose()


def test_a_resume_is_refused_while_another_run_holds_the_bench(tmp_path, db_url):
    """A run left by a killed process is resumable, but not while another run drives the bench."""
    from tonebench.store.database import open_database

    open_database(db_url).dispose()
    (tmp_path / "go").write_text("")
    killed = start_racer(tmp_path, db_url)
    wait_until(lambda: (tmp_path / f"started-{killed.pid}").exists(), "the first run")
    left = (tmp_path / f"started-{killed.pid}").read_text()
    os.kill(killed.pid, signal.SIGKILL)
    killed.wait(30)
    holder = start_racer(tmp_path, db_url)
    try:
        wait_until(lambda: (tmp_path / f"started-{holder.pid}").exists(), "the holder's run")
        guid = (tmp_path / f"started-{holder.pid}").read_text()
        result = CliRunner().invoke(app, ["resume", left, "--db", db_url])
        assert result.exit_code == 2, result.output
        line = one_error_line(result)
        assert "bench 'sim-bench-1' is in use by run" in line and guid in line and f"pid {holder.pid}" in line
        assert dict(runs_of(db_url))[left] == "aborted"  # left as it was: not taken over
    finally:
        (tmp_path / "release").write_text("")
        holder.wait(120)
    assert holder.returncode == 0, holder.stderr.read()
    result = CliRunner().invoke(app, ["resume", left, "--db", db_url, "--report", str(tmp_path / "r.html")])
    assert result.exit_code == 0, result.output
    assert dict(runs_of(db_url)) == {left: "complete", guid: "complete"}, result.output


def test_a_calibration_is_refused_while_a_run_holds_the_bench(tmp_path):
    """`cal measure-*` switches RF on (and off at connect): never on instruments a run drives."""
    db_url = f"sqlite:///{tmp_path / 't.db'}"
    from tonebench.store.database import open_database

    open_database(db_url).dispose()
    bench = tmp_path / "with-meter.toml"
    bench.write_text((SAMPLE_RUNS / "sim_bench.toml").read_text().replace(
        "[offsets]", '[instruments.power_meter]\ndialect = "generic-power-meter"\n\n[offsets]'))
    (tmp_path / "go").write_text("")
    holder = start_racer(tmp_path, db_url)
    try:
        wait_until(lambda: (tmp_path / f"started-{holder.pid}").exists(), "the holder's run")
        guid = (tmp_path / f"started-{holder.pid}").read_text()
        result = CliRunner().invoke(app, ["cal", "measure-input", "during", "--bench", str(bench), "--plan",
                                          str(write_plan(tmp_path, SMALL_PLAN)), "--db", db_url])
        assert result.exit_code == 2, result.output
        line = one_error_line(result)
        assert "bench 'sim-bench-1' is in use by run" in line and guid in line
        engine = sa.create_engine(db_url)
        with Session(engine) as session:
            assert session.scalars(select(CalibrationSet).where(CalibrationSet.name == "during")).all() == []
        engine.dispose()
    finally:
        (tmp_path / "release").write_text("")
        holder.wait(120)
    assert holder.returncode == 0, holder.stderr.read()
