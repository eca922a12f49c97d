"""The worker: runs the queued jobs of one bench one after another, unattended.

Several workers on several benches can share one database; each claims its jobs through
tonebench.queue.jobs. On SQLite one worker per database file is enforced
(tonebench.queue.worker_lock).
"""

from __future__ import annotations

import hashlib
import tempfile
import threading
from collections.abc import Callable
from pathlib import Path

from sqlalchemy import select
from sqlalchemy.orm import sessionmaker

from tonebench.config.bench_file import load_bench
from tonebench.instruments.rf_guard import Terminated
from tonebench.queue.jobs import (
    ClaimedJob,
    adopt_orphans,
    claim_next,
    finish_job,
    job_status,
    requeue_job,
)
from tonebench.queue.worker_lock import SqliteWorkerLock
from tonebench.run.ending import RunCancelled
from tonebench.run.resume import resume_run
from tonebench.run.start import execute_run
from tonebench.store.bench_lock import BenchBusy, is_free
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import Job, Run
from tonebench.store.ownership import process_owner

IDLE_POLL_S = 5.0  # how often an idle worker looks for new jobs


class JobCancelled(RunCancelled):
    """The job being run was cancelled from the queue."""


JobCallback = Callable[[str, ClaimedJob, str], None]  # (what happened, job, detail)


class Worker:
    """Runs the queued jobs of one bench, one after another, until stopped (or the queue is empty)."""

    def __init__(self, db_url: str, bench_path: Path, *, on_job: JobCallback | None = None,
                 on_progress: Callable[[int, int], None] | None = None, poll_s: float = IDLE_POLL_S,
                 report_dir: Path | None = None):
        self.db_url = db_url
        self.bench_path = Path(bench_path)
        self.bench_name = load_bench(self.bench_path).settings.bench.name
        self.on_job = on_job or (lambda what, job, detail: None)
        self.on_progress = on_progress or (lambda done, total: None)  # points of the job's run
        self.poll_s = poll_s
        self.report_dir = report_dir
        self.owner = process_owner()
        self.stop = threading.Event()  # set to end the loop after the job in hand

    def run(self, until_empty: bool = False) -> int:
        """Work until stop is set (or, with until_empty, no job is queued). Returns jobs run."""
        engine = open_database(self.db_url)
        lock = SqliteWorkerLock(self.db_url) if engine.dialect.name == "sqlite" else None
        try:
            if lock is not None:
                lock.acquire()
            sessions = session_factory(engine)
            done = 0
            for job, run_guid in adopt_orphans(sessions, self.bench_name, self.owner):
                self._run_job(sessions, job, resume_guid=run_guid)
                done += 1
            while not self.stop.is_set():
                if not is_free(sessions, self.bench_name):  # another run holds the bench: jobs wait
                    self.stop.wait(self.poll_s)
                    continue
                job = claim_next(sessions, self.bench_name, self.owner)
                if job is None:
                    if until_empty:
                        break
                    # An Event wait, not a sleep: stop (Ctrl-C, SIGTERM) ends the idle wait at once.
                    self.stop.wait(self.poll_s)
                    continue
                self._run_job(sessions, job)
                done += 1
            return done
        finally:
            if lock is not None:
                lock.release()
            engine.dispose()

    def _run_job(self, sessions: sessionmaker, job: ClaimedJob, resume_guid: str | None = None) -> None:
        """Run a claimed job (or resume its run, left by a worker that died) and record the end."""
        if resume_guid:
            self.on_job("resume", job, resume_guid)
        started: list[str] = [resume_guid] if resume_guid else []

        def link_run(guid: str) -> None:  # the job points at its run from the first point on
            if not started:  # said once the run holds the bench (a job that lost it goes back)
                self.on_job("start", job, "")
            started[:] = [guid]
            with sessions.begin() as session:
                session.get(Job, job.id).run_id = session.scalars(select(Run.id).where(Run.guid == guid)).one()

        def check_cancelled(done: int, total: int) -> None:
            if job_status(sessions, job.id) == "cancelled":
                raise JobCancelled(f"cancelled from the queue (job {job.guid})")
            self.on_progress(done, total)

        with tempfile.TemporaryDirectory(prefix="tonebench-job-") as folder:
            report = self.report_dir / f"report-{job.guid[:8]}.html" if self.report_dir else None
            try:
                if resume_guid:
                    outcome = resume_run(resume_guid, self.db_url, bench_path=self.bench_path, report_path=report,
                                         on_progress=check_cancelled, on_run_started=link_run)
                else:
                    outcome = execute_run(self._plan_file(job, Path(folder)), self.bench_path, self.db_url, report,
                                          check_cancelled, on_run_started=link_run)
            except BenchBusy as exc:
                if resume_guid:  # its run exists: left to `tonebench resume`, like any other failure
                    finish_job(sessions, job.id, "failed", str(exc), resume_guid)
                    self.on_job("failed", job, str(exc))
                    return
                # Taken by another run since the claim: the job waits its turn.
                requeue_job(sessions, job.id, f"queued again: {exc}")
                self.on_job("waiting", job, str(exc))
                self.stop.wait(self.poll_s)
                return
            except (KeyboardInterrupt, SystemExit, Terminated):
                finish_job(sessions, job.id, "failed", "the worker was stopped during the run; "
                           "`tonebench resume` continues it", started[0] if started else None)
                raise
            except Exception as exc:  # noqa: BLE001 - one failed job must not stop the night's queue
                status = "cancelled" if isinstance(exc, JobCancelled) else "failed"
                detail = " ".join(str(exc).split()) or type(exc).__name__
                finish_job(sessions, job.id, status, detail, started[0] if started else None)
                self.on_job(status, job, detail)
                return
        if outcome.status == "complete" and outcome.rf_confirmed:
            finish_job(sessions, job.id, "done", f"run {outcome.guid} complete", outcome.guid)
            self.on_job("done", job, outcome.guid)
        else:
            # 'failed' (points failed), 'paused' or 'aborted', or RF not read back off: never 'done'.
            detail = (f"run {outcome.guid} {outcome.status}: {outcome.reason}; see `tonebench show`, "
                      "continue with `tonebench resume`")
            finish_job(sessions, job.id, "failed", detail, outcome.guid)
            self.on_job("failed", job, detail)

    @staticmethod
    def _plan_file(job: ClaimedJob, folder: Path) -> Path:
        """The queued plan file itself when it is unchanged (its path is then stored with the run),
        else the queued text written to a temporary file."""
        if job.plan_path:
            path = Path(job.plan_path)
            try:
                if hashlib.sha256(path.read_bytes()).hexdigest() == job.plan_sha256:
                    return path
            except OSError:
                pass
        path = folder / f"{job.plan_name}.toml"
        path.write_text(job.plan_text, encoding="utf-8")
        return path
