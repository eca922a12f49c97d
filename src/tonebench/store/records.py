"""Write one run's lifecycle to the store: its identity, its events, its end (its points go
through store/point_writer.py)."""

from __future__ import annotations

import logging
import os
import platform
import uuid

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from tonebench.instruments.rf_guard import shielded
from tonebench.version import __version__
from tonebench.store.database import DiskFull
from tonebench.store.models import (
    Bench,
    Device,
    Event,
    Instrument,
    Offset,
    Plan,
    Run,
    utc_now,
)

_log = logging.getLogger(__name__)


REGISTRY_FIELDS = ("lot", "wafer", "position")


def device_differences(sessions, device: dict) -> list[str]:
    """What a plan's [device] says that the registry holds otherwise for the same part and serial
    (lot, wafer, position; a field either side leaves empty is no disagreement). The registry keeps
    what it has: `tonebench device` commands change it."""
    with sessions() as session:
        row = session.scalars(select(Device).filter_by(part_number=device["part_number"],
                                                       serial=device["serial"])).first()
    if row is None:
        return []
    return [f"{name} {device[name]!r} (the registry has {getattr(row, name)!r})" for name in REGISTRY_FIELDS
            if device.get(name) is not None and getattr(row, name) is not None and device[name] != getattr(row, name)]


def _get_or_create(session: Session, model, lookup: dict, **defaults):
    """The row matching `lookup`, created if missing. Two processes may race to create it (two
    workers starting on one bench): the loser's insert fails on the unique key inside a savepoint
    and it takes the winner's row."""
    row = session.scalars(select(model).filter_by(**lookup)).first()
    if row is not None:
        return row
    try:
        with session.begin_nested():
            row = model(**lookup, **defaults)
            session.add(row)
    except IntegrityError:
        row = session.scalars(select(model).filter_by(**lookup)).one()
    return row


class RunRecorder:
    """Each write is its own committed transaction, so a crash loses nothing already measured."""

    def __init__(self, sessions: sessionmaker, run_id: int, guid: str):
        self.sessions = sessions
        self.run_id = run_id
        self.guid = guid

    @classmethod
    def start(
        cls,
        sessions: sessionmaker,
        *,
        bench_name: str,
        bench_description: str,
        device: dict,
        plan_name: str,
        plan_text: str,
        plan_sha256: str,
        simulated: bool,
        instruments: list[dict],
        offsets: list[dict],
        metadata: dict,
    ) -> RunRecorder:
        guid = str(uuid.uuid4())
        with sessions.begin() as session:
            bench = _get_or_create(session, Bench, {"name": bench_name}, description=bench_description, created_at=utc_now())
            device_row = _get_or_create(
                session,
                Device,
                {"part_number": device["part_number"], "serial": device["serial"]},
                **{k: v for k, v in device.items() if k not in ("part_number", "serial")},
            )
            plan = _get_or_create(session, Plan, {"sha256": plan_sha256}, name=plan_name, text=plan_text, created_at=utc_now())
            run = Run(
                guid=guid,
                bench_id=bench.id,
                device_id=device_row.id,
                plan_id=plan.id,
                status="running",
                started_at=utc_now(),
                simulated=simulated,
                host=platform.node(),
                # Who drives it, from its first commit on: a process killed before its first
                # point still leaves a run that can be told dead (tonebench.store.ownership).
                owner=f"{platform.node()}:{os.getpid()}",
                heartbeat_at=utc_now(),
                software_version=__version__,
                metadata_json=metadata,
            )
            session.add(run)
            session.flush()
            session.add_all(Instrument(run_id=run.id, **info) for info in instruments)
            session.add_all(Offset(run_id=run.id, **row) for row in offsets)
            session.add(Event(run_id=run.id, at=utc_now(), level="info", kind="run-start", message=f"run {guid} started"))
            run_id = run.id
        return cls(sessions, run_id, guid)

    def add_metadata(self, **values) -> None:
        """Merge values into the run's metadata (e.g. the bench time it took)."""
        with self.sessions.begin() as session:
            run = session.get(Run, self.run_id)
            run.metadata_json = {**(run.metadata_json or {}), **values}

    def event(self, level: str, kind: str, message: str, details: dict | None = None) -> None:
        # A Ctrl-C or SIGTERM raised inside the commit would leave SQLAlchemy's transaction half
        # closed (ResourceClosedError instead of the stop): it is raised right after it instead.
        with shielded(), self.sessions.begin() as session:
            session.add(Event(run_id=self.run_id, at=utc_now(), level=level, kind=kind, message=message, details_json=details or {}))

    def finish(self, status: str, end_reason: str) -> None:
        """Store the run's end. On a full disk the end cannot be stored: the run stays 'running'
        under this process, which `resume` (and `runs`, `show`) close as aborted once the process
        has ended, so it is resumable either way, and the error that brought the run here (the
        point that could not be stored) is the one reported, not this one."""
        try:
            with self.sessions.begin() as session:
                run = session.get(Run, self.run_id)
                run.status = status
                run.end_reason = end_reason
                run.ended_at = utc_now()
                session.add(Event(run_id=self.run_id, at=utc_now(), level="info" if status == "complete" else "error",
                                  kind="run-end", message=f"run {status}: {end_reason}"))
        except DiskFull:
            if status == "complete":
                raise
            _log.info("disk full: the end of run %s (%s) was not stored", self.guid, status)
