"""The one writer of points: each point is its own committed transaction, so a crash loses
nothing already measured."""

from __future__ import annotations

from sqlalchemy import delete, insert, select
from sqlalchemy.orm import sessionmaker

from tonebench.errors import InputError
from tonebench.instruments.rf_guard import shielded
from tonebench.store.models import Point, utc_now
from tonebench.store.point_record import PointRecord, point_columns
from tonebench.plan.axes import point_name_of_key

_POINTS = Point.__table__


def store_point(sessions: sessionmaker, run_id: int, record: PointRecord) -> None:
    """Commit one point; a failed row with the same key is replaced (a resumed run measures it
    again), a measured one never is."""
    # Plain statements in the engine's own transaction: no session and no ORM object for a row
    # that is only ever written here (3300 rather than 1100 commits per second on SQLite).
    with shielded(), sessions.kw["bind"].begin() as connection:  # a stop waits for the commit
        existing = connection.execute(
            select(_POINTS.c.id, _POINTS.c.status).where(_POINTS.c.run_id == run_id,
                                                         _POINTS.c.point_key == record.point_key)
        ).first()
        if existing is not None:
            if existing.status == "measured":
                raise InputError(f"point {point_name_of_key(record.point_key)} of run {run_id} is already measured; not stored twice")
            connection.execute(delete(_POINTS).where(_POINTS.c.id == existing.id))
        connection.execute(insert(_POINTS), {"run_id": run_id, "measured_at": utc_now(), **point_columns(record)})
