"""Re-analysis of many runs at once, on SQLite and PostgreSQL (analyze_runs: one read, bulk inserts, one commit per batch)
stores exactly what analysing each run on its own stores, and a bad run in a batch loses nothing."""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from flag_benches import write_bench, write_plan

from tonebench.catalog.synthetic import fill
from tonebench.errors import InputError
from tonebench.results import batch_pool, stored_results
from tonebench.results.stored_results import analyze_run, analyze_runs
from tonebench.run.start import execute_run
from tonebench.store import open_database, session_factory
from tonebench.store.models import Run

# Every stored column but row ids and creation times, with each flag tied to its result's or point's group.
_RESULTS = """SELECT runs.guid, results.group_key, results.n_valid, results.iip3_dbm, results.oip3_dbm,
    results.iip3_bound_db, results.gain_db, results.p1db_in_dbm, results.reason, results.verdict,
    results.details_json, results.calibration_set_id FROM results JOIN runs ON runs.id = results.run_id"""
_RESULT_FLAGS = """SELECT runs.guid, results.group_key, f.flag, f.cause, f.detail, f.error_db FROM result_flags f
    JOIN results ON results.id = f.result_id JOIN runs ON runs.id = results.run_id"""
_POINT_FLAGS = """SELECT points.point_key, points.run_id, f.flag, f.cause, f.detail, f.error_db FROM point_flags f
    JOIN points ON points.id = f.point_id"""


def _stored(engine) -> dict[str, list]:
    with engine.connect() as connection:
        return {name: sorted(map(tuple, connection.execute(sa.text(sql)).all()), key=repr)
                for name, sql in (("results", _RESULTS), ("result flags", _RESULT_FLAGS), ("point flags", _POINT_FLAGS))}


@pytest.mark.parametrize("workers", [1, 2])  # in this process; forked workers reading, this process writing
def test_many_runs_in_batches_store_what_one_run_at_a_time_stores(tmp_path, monkeypatch, db_url, workers):
    engine = open_database(db_url)
    fill(engine, 3, seed=4, n_lots=2, batch_devices=3)
    # Two simulated runs whose results carry flags: the analyzer's own IM3, and noise.
    for folder, bench, plan in (
            ("distortion", {"mixer_toi_dbm": 5.0, "declared_toi_dbm": 5.0}, (-40.0, -28.0, 0.0)),
            ("noise", {}, (-60.0, -46.0, None))):
        (tmp_path / folder).mkdir()
        execute_run(write_plan(tmp_path / folder, *plan[:2], atten_db=plan[2]), write_bench(tmp_path / folder, **bench),
                    db_url, tmp_path / folder / "report.html", on_warning=lambda message: None)
    sessions = session_factory(engine)
    with engine.connect() as connection:
        guids = connection.scalars(sa.select(Run.guid).order_by(Run.id)).all()
    for guid in guids:
        analyze_run(sessions, guid)
    one_at_a_time = _stored(engine)
    assert all(one_at_a_time.values()), {name: len(rows) for name, rows in one_at_a_time.items()}

    monkeypatch.setattr(batch_pool, "WORKERS", workers)
    monkeypatch.setattr(stored_results, "RUNS_PER_TRANSACTION", 2)  # batches of 2, 2 and 1 run: flags must find their results across batches
    progress = []
    stored = analyze_runs(sessions, guids, on_progress=lambda done, total: progress.append((done, total)))
    assert _stored(engine) == one_at_a_time
    assert stored == len(one_at_a_time["results"])
    assert progress == [(done, len(guids)) for done in range(1, len(guids) + 1)]


def test_an_unknown_run_in_a_batch_is_refused_before_anything_is_replaced(db_url):
    engine = open_database(db_url)
    fill(engine, 2, seed=5, n_lots=1, batch_devices=2)
    sessions = session_factory(engine)
    with engine.connect() as connection:
        guids = connection.scalars(sa.select(Run.guid).order_by(Run.id)).all()
    before = _stored(engine)
    with pytest.raises(InputError, match="no run with that GUID"):
        analyze_runs(sessions, [guids[0], "0" * 32])
    assert _stored(engine) == before


def test_an_unknown_run_found_by_a_worker_is_refused_before_its_batch_is_written(db_url, monkeypatch):
    monkeypatch.setattr(batch_pool, "WORKERS", 2)
    monkeypatch.setattr(stored_results, "RUNS_PER_TRANSACTION", 1)  # two batches: two workers, the first one bad
    engine = open_database(db_url)
    fill(engine, 2, seed=5, n_lots=1, batch_devices=2)
    sessions = session_factory(engine)
    with engine.connect() as connection:
        guids = connection.scalars(sa.select(Run.guid).order_by(Run.id)).all()
    before = _stored(engine)
    with pytest.raises(InputError, match="no run with that GUID"):
        analyze_runs(sessions, ["0" * 32, guids[0]])
    assert _stored(engine) == before
