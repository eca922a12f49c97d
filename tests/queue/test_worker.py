"""The job queue and its worker, on SQLite and on a real PostgreSQL server, with real runs on the
simulated bench. The concurrency tests use separate processes, as two benches would."""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from conftest import SAMPLE_RUNS
from sqlalchemy import func, select
from typer.testing import CliRunner

from tonebench.cli import app
from tonebench.errors import InputError
from tonebench.queue.jobs import add_job, cancel_job, claim_next, list_jobs
from tonebench.queue.worker import Worker
from tonebench.queue.worker_lock import SqliteWorkerLock
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import Job, Point, Run

BENCH = SAMPLE_RUNS / "sim_bench.toml"
SMALL_PLAN = """
[plan]
name = "{name}"
[device]
part_number = "KLN-2417A"
serial = "{serial}"
[sweep]
center_freqs_hz = [2.45e9]
spacings_hz = [1.0e6]
tone_start_dbm = {start}
tone_stop_dbm = {stop}
tone_step_dbm = 2.0
[analyzer]
rbw_hz = 1000.0
atten_db = 20.0
"""


def small_plan(folder: Path, name: str, start: float = -30.0, stop: float = -26.0) -> Path:
    path = folder / f"{name}.toml"
    path.write_text(SMALL_PLAN.format(name=name, serial=f"SN-{name}", start=start, stop=stop))
    return path


@pytest.fixture
def sqlite_url(tmp_path) -> str:
    return f"sqlite:///{tmp_path / 'queue.db'}"


def sessions_for(url: str):
    return session_factory(open_database(url))


def test_add_list_cancel_and_claim_order(tmp_path, sqlite_url):
    sessions = sessions_for(sqlite_url)
    first, _ = add_job(sessions, small_plan(tmp_path, "first"), BENCH)
    urgent, _ = add_job(sessions, small_plan(tmp_path, "urgent"), BENCH, priority=5)
    dropped, _ = add_job(sessions, small_plan(tmp_path, "dropped"), BENCH)
    assert [job.plan_name for job in list_jobs(sessions)] == ["urgent", "first", "dropped"]
    assert cancel_job(sessions, dropped.guid[:8]).status == "cancelled"
    with pytest.raises(InputError, match="already cancelled"):
        cancel_job(sessions, dropped.guid)
    claimed = [claim_next(sessions, "sim-bench-1", "test:1") for _ in range(3)]
    assert [job.guid if job else None for job in claimed] == [urgent.guid, first.guid, None]
    assert claim_next(sessions, "another-bench", "test:1") is None
    assert [job.status for job in list_jobs(sessions, include_finished=True)] == ["running", "running", "cancelled"]


def test_a_plan_over_the_limits_is_refused_when_queued(tmp_path, sqlite_url):
    sessions = sessions_for(sqlite_url)
    hot = small_plan(tmp_path, "hot", start=-4.0, stop=2.0)  # the sample bench allows 0 dBm per tone
    with pytest.raises(InputError) as refused:
        add_job(sessions, hot, BENCH)
    assert "\n" not in str(refused.value) and "max_tone_dbm" in str(refused.value)
    assert list_jobs(sessions, include_finished=True) == []


def test_cli_queue_commands(tmp_path, sqlite_url):
    runner = CliRunner()
    added = runner.invoke(app, ["queue", "add", str(small_plan(tmp_path, "cli")), "--bench", str(BENCH), "--db", sqlite_url])
    assert added.exit_code == 0, added.output
    guid = added.output.split()[1]
    listed = runner.invoke(app, ["queue", "list", "--db", sqlite_url])
    assert guid[:8] in listed.output and "queued" in listed.output
    cancelled = runner.invoke(app, ["queue", "cancel", guid[:6], "--db", sqlite_url])
    assert cancelled.exit_code == 0 and "cancelled before it ran" in cancelled.output
    missing = runner.invoke(app, ["queue", "cancel", "ffffffff", "--db", sqlite_url])
    assert missing.exit_code == 2 and "no such job" in missing.output


def test_worker_runs_the_queue_in_order_and_links_each_run(tmp_path, sqlite_url):
    sessions = sessions_for(sqlite_url)
    jobs = [add_job(sessions, small_plan(tmp_path, f"night-{n}"), BENCH)[0] for n in range(2)]
    seen = []
    worker = Worker(sqlite_url, BENCH, on_job=lambda what, job, detail: seen.append((what, job.guid)),
                    report_dir=tmp_path)
    assert worker.run(until_empty=True) == 2
    assert seen == [("start", jobs[0].guid), ("done", jobs[0].guid), ("start", jobs[1].guid), ("done", jobs[1].guid)]
    with sessions() as session:
        for job in session.scalars(select(Job)):
            assert job.status == "done" and job.run.status == "complete"
            assert session.scalar(select(func.count()).select_from(Point).where(Point.run_id == job.run_id)) == 3


def test_one_worker_per_sqlite_file(tmp_path, sqlite_url):
    open_database(sqlite_url).dispose()
    held = SqliteWorkerLock(sqlite_url)
    held.acquire()
    try:
        with pytest.raises(InputError, match="one worker per database file"):
            Worker(sqlite_url, BENCH).run(until_empty=True)
        # The same refusal from the command line, as one line with exit code 2.
        result = subprocess.run([sys.executable, "-m", "tonebench", "worker", "--bench", str(BENCH), "--db", sqlite_url,
                                 "--until-empty"], capture_output=True, text=True, timeout=120)
        assert result.returncode == 2
        assert result.stderr.strip().count("\n") == 0 and "one worker per database file" in result.stderr
    finally:
        held.release()
    assert Worker(sqlite_url, BENCH).run(until_empty=True) == 0  # free again


def test_cancelling_a_running_job_stops_its_run(tmp_path, sqlite_url):
    sessions = sessions_for(sqlite_url)
    job, _ = add_job(sessions, small_plan(tmp_path, "long", start=-40.0, stop=-8.0), BENCH)
    worker = Worker(sqlite_url, BENCH)
    thread = threading.Thread(target=worker.run, kwargs={"until_empty": True})
    thread.start()
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        with sessions() as session:
            if session.scalar(select(func.count()).select_from(Point)) >= 2:
                break
        threading.Event().wait(0.05)
    cancel_job(sessions, job.guid)
    thread.join(60)
    with sessions() as session:
        stored = session.scalars(select(Job)).one()
        assert stored.status == "cancelled" and stored.finished_at is not None
        run = stored.run
        assert run is not None and run.status in ("aborted", "failed") and "cancelled" in run.end_reason
        assert 2 <= len(run.points) < 17


# --- PostgreSQL: several workers on one database ----------------------------------------------------

CLAIMER = """
import json, sys
from tonebench.store.database import open_database, session_factory
from tonebench.queue.jobs import claim_next
sessions = session_factory(open_database(sys.argv[1]))
claimed = []
while True:
    job = claim_next(sessions, "sim-bench-1", "claimer:" + sys.argv[2])
    if job is None:
        break
    claimed.append(job.id)
print(json.dumps(claimed))
"""


def test_racing_claimers_on_postgresql_never_share_a_job(tmp_path, postgres_url):
    sessions = sessions_for(postgres_url)
    plan = small_plan(tmp_path, "race")
    for _ in range(60):
        add_job(sessions, plan, BENCH)
    processes = [subprocess.Popen([sys.executable, "-c", CLAIMER, postgres_url, str(n)], stdout=subprocess.PIPE, text=True)
                 for n in range(4)]
    claimed = [json.loads(process.communicate(timeout=120)[0]) for process in processes]
    every = [job_id for ids in claimed for job_id in ids]
    assert len(every) == len(set(every)) == 60  # each job claimed once, none left behind
    with sessions() as session:
        owners = dict(session.execute(select(Job.id, Job.claimed_by)).all())
    for n, ids in enumerate(claimed):
        assert all(owners[job_id] == f"claimer:{n}" for job_id in ids)


def test_two_worker_processes_on_postgresql_run_each_job_once(tmp_path, postgres_url):
    sessions = sessions_for(postgres_url)
    jobs = [add_job(sessions, small_plan(tmp_path, f"pg-{n}"), BENCH)[0] for n in range(6)]
    command = [sys.executable, "-m", "tonebench", "worker", "--bench", str(BENCH), "--db", postgres_url,
               "--until-empty", "--reports", str(tmp_path)]
    workers = [subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    outputs = [worker.communicate(timeout=300) for worker in workers]
    assert [worker.returncode for worker in workers] == [0, 0], outputs
    with sessions() as session:
        stored = session.scalars(select(Job)).all()
        assert sorted(job.guid for job in stored) == sorted(job.guid for job in jobs)
        assert all(job.status == "done" for job in stored)
        runs = session.scalars(select(Run)).all()
        assert len(runs) == 6 and sorted(job.run_id for job in stored) == sorted(run.id for run in runs)
        assert all(run.status == "complete" and len(run.points) == 3 for run in runs)
    started = [line for out, err in outputs for line in err.splitlines() if ": start" in line]
    assert len(started) == 6  # six starts over both workers: no job ran twice


def test_a_worker_killed_mid_run_is_taken_over_and_its_run_resumed(tmp_path, sqlite_url):
    import os
    import signal

    sessions = sessions_for(sqlite_url)
    job, _ = add_job(sessions, small_plan(tmp_path, "overnight", start=-40.0, stop=-8.0), BENCH)
    killed = subprocess.Popen([sys.executable, "-m", "tonebench", "worker", "--bench", str(BENCH), "--db", sqlite_url,
                               "--until-empty"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    try:
        while True:
            with sessions() as session:
                if session.scalar(select(func.count()).select_from(Point)) >= 4:
                    break
            assert killed.poll() is None and time.monotonic() < deadline
            threading.Event().wait(0.02)
        os.kill(killed.pid, signal.SIGKILL)
    finally:
        killed.wait(30)
    with sessions() as session:
        assert session.scalars(select(Job.status)).one() == "running"  # what the dead worker left
    assert Worker(sqlite_url, BENCH).run(until_empty=True) == 1
    with sessions() as session:
        stored = session.scalars(select(Job)).one()
        assert stored.guid == job.guid and stored.status == "done"
        run = stored.run
        keys = [point.point_key for point in run.points]
        assert run.status == "complete" and len(keys) == 17 and len(set(keys)) == 17
        assert {"owner-gone", "resume"} <= {event.kind for event in run.events}
        assert session.scalar(select(func.count()).select_from(Run)) == 1  # resumed, not run again
