"""Run ownership and resuming: which process drives a run, whether it still lives, what is left.

A run records its owner ("host:pid") and a heartbeat. A run left 'running' whose owner is gone
(killed, crashed, the machine lost power) is closed as aborted with that reason, so its status is
truthful, and `tonebench resume` can continue it: points already committed are skipped by their
key, failed points are measured again (their row replaced by store/point_writer.py), and the
unique (run, point_key) constraint makes a duplicate impossible even if two resumes raced.
"""

from __future__ import annotations

import datetime as dt
import os
import platform
import time

from sqlalchemy import or_, select, update
from sqlalchemy.orm import Session, sessionmaker

from tonebench.errors import InputError
from tonebench.store.models import Event, Point, Run, utc_now

# A run on another host whose heartbeat is older than this is taken as dead (its process cannot
# be asked directly). Generous against clock skew and long recoveries.
STALE_AFTER_S = 900.0
HEARTBEAT_INTERVAL_S = 2.0


def process_owner() -> str:
    """'host:pid' of this process, as stored in Run.owner and Job.claimed_by."""
    return f"{platform.node()}:{os.getpid()}"


def owner_is_alive(owner: str | None) -> bool | None:
    """True/False for a process on this host; None when it is on another host (cannot be told)."""
    if not owner or ":" not in owner:
        return None
    host, _, pid_text = owner.rpartition(":")
    if host != platform.node() or not pid_text.isdigit():
        return None
    try:
        os.kill(int(pid_text), 0)  # signal 0: an existence check, nothing is sent
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # it exists, under another user
    return True


def owner_gone(run: Run, now: dt.datetime | None = None) -> str | None:
    """Why a 'running' run's owner is taken as gone, or None while it may still be alive."""
    alive = owner_is_alive(run.owner)
    if alive is False:
        return f"process {run.owner} ended without closing the run (killed, crashed or powered off)"
    if alive is None:
        beat = run.heartbeat_at or run.started_at
        age_s = ((now or utc_now()) - beat).total_seconds()
        if age_s > STALE_AFTER_S:
            return f"no heartbeat from {run.owner or 'its process'} for {age_s:.0f} s (killed, crashed or powered off)"
    return None


def take_ownership(sessions: sessionmaker, run_id: int, owner: str | None = None, *, resuming: bool = False) -> None:
    """Mark the run as driven by this process, running, with a fresh heartbeat.

    When resuming, only a run that is not 'running' (or was already taken by this owner with the
    bench, tonebench.store.bench_lock) is taken, in one conditional UPDATE, so two processes resuming the
    same run at once cannot both go on (InputError for the second).
    """
    owner = owner or process_owner()
    values = dict(owner=owner, heartbeat_at=utc_now(), status="running", end_reason=None, ended_at=None)
    with sessions.begin() as session:
        query = update(Run).where(Run.id == run_id)
        if resuming:
            query = query.where(or_(Run.status != "running", Run.owner == owner))
        taken = session.execute(query.values(**values).execution_options(synchronize_session=False)).rowcount
    if taken != 1:
        raise InputError(f"run {run_id} is already being resumed by another process")


class Heartbeat:
    """Updates Run.heartbeat_at at most every `interval_s` seconds (one small commit)."""

    def __init__(self, sessions: sessionmaker, run_id: int, interval_s: float = HEARTBEAT_INTERVAL_S):
        self.sessions = sessions
        self.run_id = run_id
        self.interval_s = interval_s
        self._last_s = time.monotonic()

    def beat(self) -> None:
        if time.monotonic() - self._last_s < self.interval_s:
            return
        self._last_s = time.monotonic()
        with self.sessions.begin() as session:
            session.get(Run, self.run_id).heartbeat_at = utc_now()


def close_dead_runs(sessions: sessionmaker) -> list[str]:
    """Runs left 'running' by a process that is gone become 'aborted' with the reason; their GUIDs."""
    closed = []
    with sessions.begin() as session:
        for run in session.scalars(select(Run).where(Run.status == "running")).all():
            if close_if_gone(session, run):
                closed.append(run.guid)
    return closed


def close_if_gone(session: Session, run: Run) -> bool:
    """Close a 'running' run whose owner is gone as aborted, with the reason; whether it was."""
    reason = owner_gone(run)
    if reason is None:
        return False
    run.status, run.end_reason = "aborted", reason
    run.ended_at = run.heartbeat_at or utc_now()
    session.add(Event(run_id=run.id, at=utc_now(), level="error", kind="owner-gone", message=reason))
    return True


def check_resumable(run: Run, failed_points: int = 0) -> None:
    """Refuse (InputError, one line) a run that is complete with no failed point, or is still
    driven by a live process."""
    if run.status == "complete" and failed_points == 0:
        raise InputError(f"run {run.guid} is complete; nothing to resume")
    if run.status == "running":
        where = run.owner or "another process"
        raise InputError(
            f"run {run.guid} is still running in {where} (heartbeat {run.heartbeat_at or run.started_at:%Y-%m-%d %H:%M:%S} UTC); "
            "stop that process first"
        )


def stored_points(session: Session, run_id: int) -> dict[str, str]:
    """point_key -> status of every point committed for the run."""
    return dict(session.execute(select(Point.point_key, Point.status).where(Point.run_id == run_id)).all())

