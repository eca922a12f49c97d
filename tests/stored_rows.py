"""What a run left in its SQLite database, read back for assertions."""

from __future__ import annotations

from pathlib import Path

from sqlalchemy import create_engine, func, select
from sqlalchemy.orm import Session

from tonebench.store.models import Event, Point, Run


def stored(db_path: Path):
    """The only run's status and end reason, its points by key, their keys in order, its events."""
    engine = create_engine(f"sqlite:///{db_path}")
    with Session(engine) as session:
        run = session.scalars(select(Run)).one()
        points = session.scalars(select(Point).where(Point.run_id == run.id)).all()
        events = session.scalars(select(Event).where(Event.run_id == run.id)).all()
        result = (run.status, run.end_reason, {p.point_key: p for p in points}, [p.point_key for p in points],
                  [(e.kind, e.message) for e in events])
    engine.dispose()
    return result


def count_rows(db_path: Path, model) -> int:
    if not db_path.exists():
        return 0
    engine = create_engine(f"sqlite:///{db_path}")
    try:
        with Session(engine) as session:
            return session.scalar(select(func.count()).select_from(model))
    finally:
        engine.dispose()


def count_points(db_path: Path, table=Point) -> int:
    """Like count_rows, but 0 while another process has not made the schema yet."""
    if not db_path.exists():
        return 0
    engine = create_engine(f"sqlite:///{db_path}")
    try:
        with Session(engine) as session:
            return session.scalar(select(func.count()).select_from(table)) or 0
    except Exception:  # noqa: BLE001 - the schema may not exist yet
        return 0
    finally:
        engine.dispose()
