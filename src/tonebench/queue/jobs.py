"""The job queue's table: adding, listing, cancelling jobs, and the claims a worker makes on them.

A worker claims the next queued job of its bench in one transaction: on PostgreSQL with
SELECT ... FOR UPDATE SKIP LOCKED, so two workers never take the same row and neither waits for
the other; the claiming UPDATE also requires the row to be still 'queued', so a claim stays safe
where row locks do not exist.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy import select, update
from sqlalchemy.orm import Session, sessionmaker

from tonebench.config.bench_file import load_bench
from tonebench.config.plan_file import load_plan
from tonebench.errors import InputError
from tonebench.run.bench_time import BenchTimeEstimate
from tonebench.run.preflight import preflight
from tonebench.store.models import Job, Run, utc_now
from tonebench.store.ownership import owner_is_alive

CLAIM_ATTEMPTS = 5  # claims lost to another worker before giving up for this round


@dataclass(frozen=True)
class JobView:
    """One job as shown in `queue list`."""

    guid: str
    bench_name: str
    plan_name: str
    status: str
    priority: int
    created_at: object
    claimed_by: str | None
    run_guid: str | None
    message: str | None


@dataclass(frozen=True)
class ClaimedJob:
    """What a worker needs of a job it has claimed (detached from any session)."""

    id: int
    guid: str
    plan_name: str
    plan_text: str
    plan_sha256: str
    plan_path: str | None
    claimed_at: object


def _view(job: Job) -> JobView:
    return JobView(job.guid, job.bench_name, job.plan_name, job.status, job.priority, job.created_at,
                   job.claimed_by, job.run.guid if job.run else None, job.message)


def add_job(sessions: sessionmaker, plan_path: Path, bench_path: Path,
            priority: int = 0) -> tuple[JobView, BenchTimeEstimate]:
    """Queue `plan_path` for the bench named in `bench_path`; both files are checked first (the
    run's pre-flight checks from the files: a plan that would be refused at run time is refused
    now, not at 3 am). Returns the job and the bench time its plan takes."""
    plan = load_plan(plan_path)
    bench = load_bench(bench_path)
    estimate = preflight(plan, bench, sessions).estimate()
    with sessions.begin() as session:
        job = Job(
            guid=str(uuid.uuid4()),
            bench_name=bench.settings.bench.name,
            plan_name=plan.settings.plan.name,
            plan_text=plan.text,
            plan_sha256=plan.sha256,
            plan_path=str(Path(plan_path).resolve()),
            status="queued",
            priority=priority,
            created_at=utc_now(),
        )
        session.add(job)
        session.flush()
        return _view(job), estimate


def list_jobs(sessions: sessionmaker, bench_name: str | None = None, include_finished: bool = False) -> list[JobView]:
    """Jobs in the order a worker takes them (priority, then age); finished ones only when asked."""
    with sessions() as session:
        query = select(Job).order_by(Job.priority.desc(), Job.id)
        if bench_name:
            query = query.where(Job.bench_name == bench_name)
        if not include_finished:
            query = query.where(Job.status.in_(("queued", "running")))
        return [_view(job) for job in session.scalars(query)]


def find_job(session: Session, ident: str) -> Job:
    """A job by GUID or unique GUID prefix; InputError otherwise."""
    ident = ident.strip().lower()
    if not ident:
        raise InputError("job: give a job GUID or a unique prefix of it")
    matches = session.scalars(select(Job).where(Job.guid.startswith(ident, autoescape=True)).limit(2)).all()
    if not matches:
        raise InputError(f"job '{ident}': no such job; see `tonebench queue list --all`")
    if len(matches) > 1:
        raise InputError(f"job '{ident}': more than one job starts with this; give more characters")
    return matches[0]


def cancel_job(sessions: sessionmaker, ident: str) -> JobView:
    """Cancel a queued job, or ask the worker running it to stop (it stops after the point in hand,
    RF off, the run stored as aborted)."""
    with sessions.begin() as session:
        job = find_job(session, ident)
        if job.status not in ("queued", "running"):
            raise InputError(f"job {job.guid}: already {job.status}; only queued or running jobs can be cancelled")
        was_running = job.status == "running"
        job.status = "cancelled"
        job.message = "cancelled while running; the worker stops it" if was_running else "cancelled before it ran"
        if not was_running:
            job.finished_at = utc_now()
        return _view(job)


def claim_next(sessions: sessionmaker, bench_name: str, owner: str) -> ClaimedJob | None:
    """Take the next queued job of `bench_name` for `owner`, or None when there is none."""
    for _ in range(CLAIM_ATTEMPTS):
        claimed, found = _claim_once(sessions, bench_name, owner)
        if claimed is not None or not found:
            return claimed
    return None


def _claim_once(sessions: sessionmaker, bench_name: str, owner: str) -> tuple[ClaimedJob | None, bool]:
    """(the job claimed, whether a queued job was seen at all): seen but not claimed means another
    worker took it between the two statements (only possible without row locks)."""
    with sessions.begin() as session:
        candidate = session.scalars(
            select(Job)
            .where(Job.bench_name == bench_name, Job.status == "queued")
            .order_by(Job.priority.desc(), Job.id)
            .limit(1)
            .with_for_update(skip_locked=True)  # PostgreSQL row lock; nothing on SQLite
        ).first()
        if candidate is None:
            return None, False
        claimed_at = utc_now()
        taken = session.execute(
            update(Job)
            .where(Job.id == candidate.id, Job.status == "queued")
            .values(status="running", claimed_by=owner, claimed_at=claimed_at)
            .execution_options(synchronize_session=False)
        ).rowcount
        if taken != 1:
            return None, True
        return ClaimedJob(candidate.id, candidate.guid, candidate.plan_name, candidate.plan_text,
                          candidate.plan_sha256, candidate.plan_path, claimed_at), True


def finish_job(sessions: sessionmaker, job_id: int, status: str, message: str, run_guid: str | None = None) -> None:
    """Record the end of a job; a job cancelled meanwhile stays cancelled."""
    with sessions.begin() as session:
        job = session.get(Job, job_id)
        if run_guid is not None:
            job.run_id = session.scalars(select(Run.id).where(Run.guid == run_guid)).first()
        if job.status != "cancelled":
            job.status = status
        job.message = message
        job.finished_at = utc_now()


def requeue_job(sessions: sessionmaker, job_id: int, message: str) -> None:
    """Put a claimed job whose run did not start back in the queue (unless cancelled meanwhile)."""
    with sessions.begin() as session:
        job = session.get(Job, job_id)
        if job.status == "running":
            job.status, job.claimed_by, job.claimed_at, job.message = "queued", None, None, message


def job_status(sessions: sessionmaker, job_id: int) -> str:
    with sessions() as session:
        return session.scalars(select(Job.status).where(Job.id == job_id)).one()


def adopt_orphans(sessions: sessionmaker, bench_name: str, owner: str) -> list[tuple[ClaimedJob, str]]:
    """Jobs of this bench left 'running' by a worker of this host that no longer exists (killed,
    crashed, power lost). One whose run had not started is queued again; one whose run had is
    claimed by `owner`, to be resumed. Returns the claimed jobs with their run GUIDs."""
    adopted = []
    with sessions.begin() as session:
        jobs = session.scalars(select(Job).where(Job.bench_name == bench_name, Job.status == "running")
                               .with_for_update(skip_locked=True)).all()
        for job in jobs:
            if owner_is_alive(job.claimed_by) is not False:
                continue
            if job.run_id is None:
                job.status, job.claimed_by, job.claimed_at = "queued", None, None
                job.message = "queued again: its worker died before the run started"
                continue
            claimed_at = utc_now()
            job.claimed_by, job.claimed_at = owner, claimed_at
            job.message = "resumed: its worker died during the run"
            adopted.append((ClaimedJob(job.id, job.guid, job.plan_name, job.plan_text, job.plan_sha256,
                                       job.plan_path, claimed_at), job.run.guid))
    return adopted
