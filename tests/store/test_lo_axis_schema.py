"""Migration 0007 (the LO power axis) on both backends: a result stored under 0006 keeps its
group key through the upgrade; results per LO level get distinct keys; down to 0006 drops the
columns when no result is per LO level, and refuses (nothing changed) when one is."""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from test_bias_schema import migrate
from test_database import drift, make_point, make_run

from tonebench.store import session_factory
from tonebench.store.database import database_revision
from tonebench.store.models import Point, Result


def _columns(engine, table: str) -> set[str]:
    return {c["name"] for c in sa.inspect(engine).get_columns(table)}


def test_0007_up_from_0006_keeps_existing_keys_and_down_again(engine):
    migrate(engine, "downgrade", "0006")
    assert "lo_dbm" not in _columns(engine, "points") | _columns(engine, "results")
    with session_factory(engine)() as session:
        run = make_run(session)
        run_id = run.id
    with engine.begin() as connection:  # a result as 0006 wrote it (the model now has lo_dbm)
        connection.execute(sa.text(
            "INSERT INTO results (run_id, group_key, center_hz, spacing_hz, n_points, n_valid, details_json, "
            "created_at) VALUES (:run_id, :key, 2.4e9, 1e6, 1, 1, '{}', CURRENT_TIMESTAMP)"),
            {"run_id": run_id, "key": "center_hz=2400000000.0;spacing_hz=1000000.0;bias_v=none"})
    migrate(engine, "upgrade", "head")
    assert drift(engine) == []
    with session_factory(engine)() as session:
        old = session.scalars(sa.select(Result)).one()
        assert old.lo_dbm is None and old.group_key == "center_hz=2400000000.0;spacing_hz=1000000.0;bias_v=none"
        old.n_valid = 2  # rewritten by the ORM hook on update: the same key
        session.commit()
        assert old.group_key == "center_hz=2400000000.0;spacing_hz=1000000.0;bias_v=none"
        for lo_dbm in (7.0, 1.0):
            session.add(Result(run_id=run_id, center_hz=2.4e9, spacing_hz=1e6, lo_dbm=lo_dbm, n_points=1, n_valid=1))
        session.commit()
        keys = set(session.scalars(sa.select(Result.group_key)).all())
        base = "center_hz=2400000000.0;spacing_hz=1000000.0;bias_v=none"
        assert keys == {base, f"{base};lo_dbm=7.0", f"{base};lo_dbm=1.0"}
        point = make_point(run_id, "lo+7.00dBm/c1/p-20", 0)
        point.lo_dbm = 7.0
        session.add(point)
        session.commit()
    with pytest.raises(RuntimeError, match="results are per LO level"):
        migrate(engine, "downgrade", "0006")
    assert database_revision(engine) == "0007"
    with session_factory(engine)() as session:
        session.execute(sa.delete(Result).where(Result.lo_dbm.is_not(None)))
        session.execute(sa.delete(Point))
        session.commit()
    migrate(engine, "downgrade", "0006")
    assert database_revision(engine) == "0006"
    assert "lo_dbm" not in _columns(engine, "points") | _columns(engine, "results")
    migrate(engine, "upgrade", "head")
    assert drift(engine) == []
