"""The one writer of points: each point is its own committed transaction, so a crash loses
nothing already measured."""

from __future__ import annotations

from sqlalchemy import delete, select
from sqlalchemy.orm import sessionmaker

from tonebench.errors import InputError
from tonebench.store.models import Point, utc_now
from tonebench.store.point_record import PointRecord, point_columns
from tonebench.plan.axes import point_name_of_key


def store_point(sessions: sessionmaker, run_id: int, record: PointRecord) -> None:
    """Commit one point; a failed row with the same key is replaced (a resumed run measures it
    again), a measured one never is."""
    with sessions.begin() as session:
        existing = session.scalars(
            select(Point).where(Point.run_id == run_id, Point.point_key == record.point_key)
        ).first()
        if existing is not None:
            if existing.status == "measured":
                raise InputError(f"point {point_name_of_key(record.point_key)} of run {run_id} is already measured; not stored twice")
            session.execute(delete(Point).where(Point.id == existing.id))
        session.add(Point(run_id=run_id, measured_at=utc_now(), **point_columns(record)))
