"""Migration 0006 on both backends: down to 0005 drops the per-level results, the intercept
convention and IMD limits (other limits stay); up again the schema matches the models, IMD
limits are accepted, an unknown convention refused."""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from test_bias_schema import migrate
from test_database import drift, make_run

from tonebench.store import session_factory
from tonebench.store.database import database_revision
from tonebench.store.models import Result, SpecLimit


def _limits(session) -> None:
    session.add_all([SpecLimit(part_number="KQX-9", parameter="iip3_dbm", min_value=0.0, freq_min_hz=1e9, freq_max_hz=3e9),
                     SpecLimit(part_number="KQX-9", parameter="im3_dbc", max_value=-40.0, freq_min_hz=1e9,
                               freq_max_hz=3e9, tone_dbm=-20.0)])


def test_0006_down_and_up_again(engine):
    with session_factory(engine)() as session:
        _limits(session)
        session.commit()
    migrate(engine, "downgrade", "0005")
    inspector = sa.inspect(engine)
    assert database_revision(engine) == "0005"
    assert "level_results" not in inspector.get_table_names()
    assert "intercept_convention" not in {c["name"] for c in inspector.get_columns("results")}
    with engine.connect() as connection:
        assert connection.execute(sa.text("SELECT parameter FROM spec_limits")).scalars().all() == ["iip3_dbm"]
    migrate(engine, "upgrade", "head")
    assert drift(engine) == []
    with session_factory(engine)() as session:
        _limits(session)
        session.commit()
        run = make_run(session)
        session.add(Result(run_id=run.id, center_hz=2e9, spacing_hz=1e6, n_points=1, n_valid=1,
                           intercept_convention="best"))
        with pytest.raises(sa.exc.IntegrityError):
            session.commit()


def test_imd_limit_judges_stored_level_rows(engine):
    """apply_verdicts on both backends: an IMD limit at -20 dBm judges the row at that level only."""
    from test_database import make_point

    from tonebench.catalog.limits import apply_verdicts
    from tonebench.store.models import Device, LevelResult

    with session_factory(engine)() as session:
        run = make_run(session)
        run.device = Device(part_number="KQX-9", serial="KQX9-0001")
        point = make_point(run.id, "c1/p-20", 0)
        session.add(point)
        session.flush()
        result = Result(run_id=run.id, center_hz=2.4e9, spacing_hz=1e6, n_points=1, n_valid=1,
                        intercept_convention="mean")
        session.add(result)
        session.flush()
        session.add_all([LevelResult(result_id=result.id, point_id=point.id, tone_dbm=-20.0,
                                     im3_lower_dbc=-41.0, im3_upper_dbc=-39.5),
                         SpecLimit(part_number="KQX-9", parameter="im3_dbc", max_value=-40.0, freq_min_hz=1e9,
                                   freq_max_hz=3e9, tone_dbm=-20.0)])
        session.commit()
        assert apply_verdicts(session, run.id) == {"fail": 1}
        assert result.verdict_detail == "im3_dbc at -20.00 dBm per tone (limit 1): -39.50 dBc above max -40.00"
        session.commit()
        session.delete(result)  # its level rows go with it
        session.commit()
        assert session.scalar(sa.select(sa.func.count(LevelResult.id))) == 0
