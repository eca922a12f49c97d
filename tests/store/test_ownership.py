"""Run ownership pieces used by resume: a dead owner is noticed, its run closed truthfully, a point
is never stored twice; and the event log writes the database and the text file."""

from __future__ import annotations

import datetime as dt
import platform
import subprocess
import sys

import pytest
from sqlalchemy import func, select

from tonebench.errors import InputError
from tonebench.store.ownership import (
    STALE_AFTER_S,
    Heartbeat,
    check_resumable,
    close_dead_runs,
    owner_is_alive,
    process_owner,
    stored_points,
    take_ownership,
)
from tonebench.run.event_log import RunLog, log_path_for
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import Event, Point, Run, utc_now
from tonebench.store.point_record import PointRecord
from tonebench.store.point_writer import store_point
from tonebench.store.records import RunRecorder


@pytest.fixture
def sessions(tmp_path):
    engine = open_database(f"sqlite:///{tmp_path / 'life.db'}")
    yield session_factory(engine)
    engine.dispose()


def start_run(sessions) -> RunRecorder:
    return RunRecorder.start(
        sessions, bench_name="b", bench_description="", device={"part_number": "P", "serial": "S"},
        plan_name="p", plan_text="x", plan_sha256="0" * 64, simulated=True, instruments=[], offsets=[], metadata={},
    )


def dead_pid() -> int:
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def point_row(key: str, status: str = "measured", reason: str | None = None) -> PointRecord:
    return PointRecord(point_key=key, seq=0, status=status, fail_reason=reason, bench_clock_s=0.0, center_hz=2.4e9,
                spacing_hz=1e6, f1_hz=2.3995e9, f2_hz=2.4005e9, tone_dbm=-20.0)


def test_owner_liveness_on_this_host():
    assert owner_is_alive(process_owner()) is True
    assert owner_is_alive(f"{platform.node()}:{dead_pid()}") is False
    assert owner_is_alive("some-other-host:1") is None  # cannot be asked from here
    assert owner_is_alive(None) is None


def test_a_run_whose_owner_died_is_closed_as_aborted_with_the_reason(sessions):
    alive, dead, remote = start_run(sessions), start_run(sessions), start_run(sessions)
    take_ownership(sessions, alive.run_id)
    take_ownership(sessions, dead.run_id, f"{platform.node()}:{dead_pid()}")
    take_ownership(sessions, remote.run_id, "bench-pc-7:4242")
    assert close_dead_runs(sessions) == [dead.guid]
    with sessions.begin() as session:
        run = session.get(Run, dead.run_id)
        assert run.status == "aborted" and "ended without closing the run" in run.end_reason
        assert session.get(Run, alive.run_id).status == "running"
        # Another host's run is taken as dead only once its heartbeat is stale.
        session.get(Run, remote.run_id).heartbeat_at = utc_now() - dt.timedelta(seconds=STALE_AFTER_S + 60)
    assert close_dead_runs(sessions) == [remote.guid]
    with sessions() as session:
        assert "no heartbeat from bench-pc-7:4242" in session.get(Run, remote.run_id).end_reason
        kinds = session.scalars(select(Event.kind).where(Event.run_id == dead.run_id)).all()
        assert "owner-gone" in kinds


def test_resumable_only_when_not_complete_and_not_alive(sessions):
    recorder = start_run(sessions)
    take_ownership(sessions, recorder.run_id)
    with sessions() as session:
        with pytest.raises(InputError, match="still running in"):
            check_resumable(session.get(Run, recorder.run_id))
    recorder.finish("complete", "all done")
    with sessions() as session:
        with pytest.raises(InputError, match="is complete; nothing to resume"):
            check_resumable(session.get(Run, recorder.run_id))


def test_a_failed_point_is_replaced_and_a_measured_one_never_stored_twice(sessions):
    run_id = start_run(sessions).run_id
    store_point(sessions, run_id, point_row("a"))
    store_point(sessions, run_id, point_row("b", "failed", "analyzer: no reply"))
    with sessions() as session:
        assert stored_points(session, run_id) == {"a": "measured", "b": "failed"}
    store_point(sessions, run_id, point_row("b"))
    with pytest.raises(InputError, match="already measured"):
        store_point(sessions, run_id, point_row("a"))
    with sessions() as session:
        assert stored_points(session, run_id) == {"a": "measured", "b": "measured"}
        assert session.scalar(select(func.count()).select_from(Point)) == 2


def test_heartbeat_is_rate_limited(sessions):
    run_id = start_run(sessions).run_id
    take_ownership(sessions, run_id)
    with sessions() as session:
        first = session.get(Run, run_id).heartbeat_at
    beat = Heartbeat(sessions, run_id, interval_s=0.0)
    beat.beat()
    with sessions() as session:
        assert session.get(Run, run_id).heartbeat_at >= first
    slow = Heartbeat(sessions, run_id, interval_s=3600.0)
    with sessions.begin() as session:
        session.get(Run, run_id).heartbeat_at = first - dt.timedelta(hours=1)
    slow.beat()  # within its interval: nothing written
    with sessions() as session:
        assert session.get(Run, run_id).heartbeat_at == first - dt.timedelta(hours=1)


def test_run_log_writes_the_event_and_a_line_beside_the_database(tmp_path, sessions):
    recorder = start_run(sessions)
    path = log_path_for(f"sqlite:///{tmp_path / 'life.db'}")
    assert path == (tmp_path / "life.log").resolve()
    log = RunLog(recorder, path)
    log.event("warning", "retry", "analyzer: no reply to\nread_marker_power", {"attempt": 1})
    lines = path.read_text().splitlines()
    assert len(lines) == 1 and f"run {recorder.guid[:8]} warning retry" in lines[0]
    assert lines[0].endswith("analyzer: no reply to read_marker_power")  # one line per event
    with sessions() as session:
        event = session.scalars(select(Event).where(Event.kind == "retry")).one()
        assert event.details_json == {"attempt": 1}
    assert log_path_for("postgresql+psycopg://u@h/db").name == "tonebench.log"
