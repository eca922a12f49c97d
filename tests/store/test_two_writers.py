"""Two benches writing to one database at once: two processes record runs point by point through
the point writer (one commit per point) at the same time; afterwards every row is there, once.

The overlap is forced, not hoped for: every BARRIER_EVERY points each writer, having committed,
reports to the test and waits until the other has reached the same place too, so each stretch
between two such meetings holds points of both writers, whatever the machine's load.

PostgreSQL is the case that matters (several benches, one server); SQLite in WAL mode with a busy
timeout is checked too, for two processes on one machine.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import sqlalchemy as sa

import tonebench
from tonebench.store import open_database, session_factory
from tonebench.store.models import Bench, Device, Event, Plan, Point, Run, utc_now

SRC_DIR = Path(tonebench.__file__).resolve().parent.parent
RUNS_PER_WRITER = 4
POINTS_PER_RUN = 30
BARRIER_EVERY = 10  # points per writer between two meetings
BARRIERS = RUNS_PER_WRITER * POINTS_PER_RUN // BARRIER_EVERY
PLAN_TEXT = "[plan]\nname = 'shared'\n"
PLAN_SHA = hashlib.sha256(PLAN_TEXT.encode()).hexdigest()

WRITER = textwrap.dedent("""
    import sys
    from tonebench.store import open_database, session_factory
    from tonebench.store.point_record import PointRecord
    from tonebench.store.point_writer import store_point
    from tonebench.store.records import RunRecorder

    url, name, n_runs, n_points, plan_text, plan_sha, every = sys.argv[1:8]
    sessions = session_factory(open_database(url))
    print("ready", flush=True)
    sys.stdin.readline()  # both writers start together
    for r in range(int(n_runs)):
        recorder = RunRecorder.start(
            sessions, bench_name=f"bench-{name}", bench_description="concurrency test",
            device={"part_number": "CCX-100", "serial": f"{name}-{r:03d}", "lot": "LC-1", "tags": ["conc"]},
            plan_name="shared", plan_text=plan_text, plan_sha256=plan_sha, simulated=True,
            instruments=[{"role": "analyzer", "resource": "TCPIP0::127.0.0.1::1::SOCKET", "dialect": "d", "idn": "x"}],
            offsets=[], metadata={"writer": name})
        for k in range(int(n_points)):
            tone_dbm = -40.0 + k
            store_point(sessions, recorder.run_id, PointRecord(
                point_key=f"p{k:03d}", seq=k, status="measured", bench_clock_s=k * 0.5, center_hz=2.45e9,
                spacing_hz=1e6, f1_hz=2.4495e9, f2_hz=2.4505e9, tone_dbm=tone_dbm, raw_f1_dbm=tone_dbm + 14.0,
                raw_lower_dbm=3 * tone_dbm - 20.0))
            if k % int(every) == 0:  # committed: meet the other writer before going on
                print(f"at {r}-{k}", flush=True)
                sys.stdin.readline()
        recorder.event("info", "note", f"{name} run {r} measured")
        recorder.finish("complete", f"all {n_points} points measured")
    print("done", flush=True)
""")


def test_two_processes_write_runs_and_points_at_once(db_url):
    engine = open_database(db_url)
    # The shared plan exists before the benches start, as it does once any bench has used it.
    # (Two processes creating the same new plan at the same instant is left to the recorder.)
    with session_factory(engine).begin() as session:
        session.add(Plan(name="shared", text=PLAN_TEXT, sha256=PLAN_SHA, created_at=utc_now()))
    pythonpath = os.pathsep.join(filter(None, [str(SRC_DIR), os.environ.get("PYTHONPATH")]))
    env = dict(os.environ, PYTHONPATH=pythonpath)
    writers = [subprocess.Popen([sys.executable, "-c", WRITER, db_url, name, str(RUNS_PER_WRITER),
                                 str(POINTS_PER_RUN), PLAN_TEXT, PLAN_SHA, str(BARRIER_EVERY)],
                                stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
               for name in ("A", "B")]
    # A writer that hangs must not hang the test: both are killed after this long.
    deadline = threading.Timer(300, lambda: [w.kill() for w in writers if w.poll() is None])
    deadline.start()
    try:
        for writer in writers:
            assert writer.stdout.readline().strip() == "ready", writer.stderr.read()
        release_all(writers)  # both writers start together
        for meeting in range(BARRIERS):
            places = [writer.stdout.readline().strip() for writer in writers]
            assert places[0] == places[1] and places[0].startswith("at "), (meeting, places)
            release_all(writers)
        for writer in writers:
            out, err = writer.communicate(timeout=300)
            assert writer.returncode == 0 and out.strip() == "done", err
    finally:
        deadline.cancel()
        for writer in writers:
            if writer.poll() is None:
                writer.kill()

    with session_factory(engine)() as session:
        runs = session.scalars(sa.select(Run)).all()
        assert len(runs) == 2 * RUNS_PER_WRITER and all(r.status == "complete" for r in runs)
        assert len({r.guid for r in runs}) == len(runs)
        for run in runs:
            keys = [p.point_key for p in run.points]
            assert keys == [f"p{k:03d}" for k in range(POINTS_PER_RUN)], run.guid
            assert [p.seq for p in run.points] == list(range(POINTS_PER_RUN))
        total = session.scalar(sa.select(sa.func.count()).select_from(Point))
        assert total == 2 * RUNS_PER_WRITER * POINTS_PER_RUN
        assert session.scalar(sa.select(sa.func.count()).select_from(Device)) == 2 * RUNS_PER_WRITER
        assert sorted(session.scalars(sa.select(Bench.name))) == ["bench-A", "bench-B"]
        assert session.scalar(sa.select(sa.func.count()).select_from(Plan)) == 1
        notes = session.scalars(sa.select(Event.message).where(Event.kind == "note")).all()
        assert len(notes) == 2 * RUNS_PER_WRITER

        # The writes really overlapped: in commit-time order, the two benches' points interleave,
        # at least once in each stretch between two meetings (each holds points of both).
        order = session.execute(sa.select(Bench.name).select_from(Point).join(Run, Run.id == Point.run_id)
                                .join(Bench, Bench.id == Run.bench_id).order_by(Point.measured_at, Point.id)).scalars().all()
        switches = sum(1 for a, b in zip(order, order[1:]) if a != b)
        assert switches >= BARRIERS, "the two writers ran one after the other, not at the same time"
    engine.dispose()


def release_all(writers) -> None:
    for writer in writers:
        writer.stdin.write("go\n")
        writer.stdin.flush()
