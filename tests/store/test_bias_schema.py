"""Migrations 0003 and 0005 on both backends: down to 0002 drops the bias tables and columns and keeps the
points; up again restores them, matching the models; a study's rows go with it."""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from alembic import command
from test_database import drift, make_point, make_run

from tonebench.store import session_factory
from tonebench.store.database import alembic_config, database_revision
from tonebench.store.models import BiasStudy, DcPoint, Device, SpecLimit

BIAS_TABLES = {"bias_studies", "dc_points", "bias_findings"}
BIAS_COLUMNS = {"gate_read_v", "gate_current_a", "drain_read_v", "drain_current_a"}


def schema(engine) -> tuple[set[str], set[str]]:
    inspector = sa.inspect(engine)
    return set(inspector.get_table_names()), {c["name"] for c in inspector.get_columns("points")}


def migrate(engine, direction: str, revision: str) -> None:
    with engine.begin() as connection:
        getattr(command, direction)(alembic_config(connection), revision)


def test_down_to_0002_and_up_again(engine):
    with session_factory(engine)() as session:
        run = make_run(session)
        session.add(make_point(run.id, "c1/p-20", 0))
        session.add(BiasStudy(guid="s1", device_id=_device(session), bench_name="b", drain_v=3.0,
                              window_points=81, polyorder=5, step_v=1e-3, current_sigma_a=2e-7, run_guids=run.guid,
                              dc_points=[DcPoint(seq=0, gate_v=0.5, gate_read_v=0.5, drain_read_v=3.0,
                                                 drain_current_a=4e-3)]))
        session.commit()
    migrate(engine, "downgrade", "0002")
    tables, columns = schema(engine)
    assert database_revision(engine) == "0002"
    assert not tables & BIAS_TABLES and not columns & BIAS_COLUMNS
    with engine.connect() as connection:
        assert connection.execute(sa.text("SELECT count(*) FROM points")).scalar() == 1
    migrate(engine, "upgrade", "head")
    tables, columns = schema(engine)
    assert tables >= BIAS_TABLES and columns >= BIAS_COLUMNS and drift(engine) == []


def _device(session) -> int:
    device = Device(part_number="TBF-77", serial="TBF77-0042")
    session.add(device)
    session.flush()
    return device.id


def test_0005_down_drops_finding_limits_and_up_judges_them_again(engine):
    """Down to 0004: limits on sweet-spot parameters cannot live under the old constraint and go,
    result limits stay; up again the new parameters are accepted and unknown ones still refused."""
    with session_factory(engine)() as session:
        session.add_all([SpecLimit(part_number="TBF-77", parameter="iip3_dbm", min_value=0.0, freq_min_hz=1e9, freq_max_hz=3e9),
                         SpecLimit(part_number="TBF-77", parameter="sweet_spot_v", min_value=0.5, freq_min_hz=1e9,
                                   freq_max_hz=3e9, temp_min_c=20.0)])
        session.commit()
    migrate(engine, "downgrade", "0004")
    with engine.connect() as connection:
        assert connection.execute(sa.text("SELECT parameter FROM spec_limits")).scalars().all() == ["iip3_dbm"]
    migrate(engine, "upgrade", "head")
    assert drift(engine) == []
    with session_factory(engine)() as session:
        session.add(SpecLimit(part_number="TBF-77", parameter="window_width_v", min_value=0.01, freq_min_hz=1e9,
                              freq_max_hz=3e9))
        session.commit()
        session.add(SpecLimit(part_number="TBF-77", parameter="nf_db", min_value=1.0, freq_min_hz=1e9, freq_max_hz=3e9))
        with pytest.raises(sa.exc.IntegrityError):
            session.commit()
