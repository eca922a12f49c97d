"""One run per bench at a time, across processes (and hosts sharing a PostgreSQL database).

The lock is the run row itself: a bench is held while one of its runs is 'running' and the
run's owner is alive (host:pid on this host, the heartbeat from another; tonebench.store.ownership).
Taking it is one transaction that the database serialises: SQLite BEGIN IMMEDIATE (one writer
at a time), PostgreSQL an advisory lock scoped to the transaction and keyed by the bench name.
Inside it a live holder refuses the run (one line naming its host, pid and run GUID), a dead
one is closed as aborted, and this run's row is written (a new run) or the run is taken over (a
resume). Two processes starting at the same instant are so put in order, and the second sees the
first's row. The lock is released when the run's row leaves 'running' (every end the runner
records), when its process dies (the next taker finds it gone), and by `release` on every way
out of the runner, so an error the runner did not record cannot hold a worker's bench.

`check_free` is the same test without the serialising transaction, made before the bench is
connected, so a second run does not talk to instruments another run is driving.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from sqlalchemy import select, text, update
from sqlalchemy.orm import Session, sessionmaker

from tonebench.errors import InputError
from tonebench.store.ownership import close_if_gone, process_owner
from tonebench.store.models import Bench, Event, Run, utc_now


class BenchBusy(InputError):
    """Another live run holds the bench (bad input for a command; a worker's job waits instead)."""


def _holder(session: Session, bench_name: str, except_run_id: int | None) -> Run | None:
    """A live run holding the bench (dead holders are closed as aborted on the way)."""
    query = select(Run).join(Bench, Run.bench_id == Bench.id).where(Bench.name == bench_name, Run.status == "running")
    if except_run_id is not None:
        query = query.where(Run.id != except_run_id)
    for run in session.scalars(query.order_by(Run.id)).all():
        if not close_if_gone(session, run):
            return run
    return None


def _refuse(bench_name: str, run: Run) -> BenchBusy:
    host, _, pid = (run.owner or "?:?").rpartition(":")
    beat = run.heartbeat_at or run.started_at
    return BenchBusy(
        f"bench {bench_name!r} is in use by run {run.guid} (host {host}, pid {pid}, heartbeat "
        f"{beat:%Y-%m-%d %H:%M:%S} UTC); one run per bench at a time: wait for it to end or stop it first"
    )


def check_free(sessions: sessionmaker, bench_name: str, except_run_id: int | None = None) -> None:
    """Refuse (InputError, one line) when another live run holds the bench."""
    with sessions.begin() as session:
        run = _holder(session, bench_name, except_run_id)
        if run is not None:
            raise _refuse(bench_name, run)


def check_free_at(db_url: str, sessions: sessionmaker | None, bench_name: str) -> None:
    """check_free before the run's database is open (bad input must not create it): a database
    file that does not exist yet has no holder."""
    if sessions is not None:
        return check_free(sessions, bench_name)
    from sqlalchemy.engine import make_url

    from tonebench.store.database import open_database, session_factory

    url = make_url(db_url)
    if url.get_backend_name() == "sqlite" and (not url.database or not Path(url.database).expanduser().exists()):
        return None
    engine = open_database(db_url)
    try:
        return check_free(session_factory(engine), bench_name)
    finally:
        engine.dispose()


def is_free(sessions: sessionmaker, bench_name: str) -> bool:
    try:
        check_free(sessions, bench_name)
    except BenchBusy:
        return False
    return True


def _serialise(connection, bench_name: str) -> None:
    """Begin the transaction so that no second taker of this bench runs alongside it."""
    if connection.dialect.name == "sqlite":
        # The write lock at once, not at the first write: two takers cannot both read 'free'.
        connection.exec_driver_sql("BEGIN IMMEDIATE")
    elif connection.dialect.name == "postgresql":
        key = int.from_bytes(hashlib.sha256(f"tonebench bench {bench_name}".encode()).digest()[:8], "big", signed=True)
        connection.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": key})
    else:
        connection.begin()  # other databases: their own isolation, not serialised here


class BenchHold:
    """A bench being taken for a new run: write the run row through `sessions`, then commit()."""

    def __init__(self, connection, engine_sessions: sessionmaker):
        self.connection = connection
        self.engine_sessions = engine_sessions
        self.sessions = sessionmaker(bind=connection, expire_on_commit=False, join_transaction_mode="create_savepoint")
        self.run_id: int | None = None

    def commit(self, recorder):
        """The run row is written: commit (the bench is now held by it) and give back a recorder
        that writes through the engine's own sessions."""
        self.connection.commit()
        self.connection.close()
        self.run_id = recorder.run_id
        return type(recorder)(self.engine_sessions, recorder.run_id, recorder.guid)


@contextmanager
def hold_bench(sessions: sessionmaker, bench_name: str, *, resume_run_id: int | None = None) -> Iterator[BenchHold | None]:
    """Take the bench for the rest of the `with` block (held by the run row, see the module).

    New run: yields a BenchHold; write the run row through its sessions, then commit(). Resume:
    the run `resume_run_id` is taken over at once (running, owned by this process); yields None.
    On leaving, the run is released (closed as failed) if it is still 'running' under this process.
    """
    hold = None
    run_id = resume_run_id
    connection = sessions.kw["bind"].connect()
    try:
        _serialise(connection, bench_name)
        with Session(bind=connection, expire_on_commit=False, join_transaction_mode="create_savepoint") as session:
            holder = _holder(session, bench_name, resume_run_id)
            if holder is not None:
                raise _refuse(bench_name, holder)
            if resume_run_id is not None:
                _take_over(session, resume_run_id)
            session.commit()
        if resume_run_id is not None:
            connection.commit()
            connection.close()
        else:
            hold = BenchHold(connection, sessions)
    except BaseException:
        connection.close()  # rolls back what was not committed
        raise
    try:
        yield hold
    finally:
        if hold is not None:
            hold.connection.close()  # a no-op after commit(); else the run row is rolled back
            run_id = hold.run_id
        if run_id is not None:
            release(sessions, run_id)


def _take_over(session: Session, run_id: int) -> None:
    values = dict(owner=process_owner(), heartbeat_at=utc_now(), status="running", end_reason=None, ended_at=None)
    taken = session.execute(update(Run).where(Run.id == run_id, Run.status != "running").values(**values)
                            .execution_options(synchronize_session=False)).rowcount
    if taken != 1:
        raise InputError(f"run {run_id} is already being resumed by another process")


def release(sessions: sessionmaker, run_id: int) -> None:
    """Close the run as failed if it is still 'running' under this process (a way out the runner
    did not record). Best effort: if the database cannot be written now, the next taker finds
    this process gone."""
    try:
        with sessions.begin() as session:
            run = session.get(Run, run_id)
            if run is None or run.status != "running" or run.owner != process_owner():
                return
            reason = "the run ended without recording its end (an error before or after measuring)"
            run.status, run.end_reason, run.ended_at = "failed", reason, utc_now()
            session.add(Event(run_id=run_id, at=utc_now(), level="error", kind="run-end", message=f"run failed: {reason}"))
    except Exception:  # noqa: BLE001 - never hide the error that is leaving the runner
        pass
