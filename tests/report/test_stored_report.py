"""The run report is built from the stored results, not assessed again, and shows the same page
the live assessment gives: numbers, bounds, flags, the second order, the valid region; a run whose
points have no current stored results is assessed again (runs on the simulated bench)."""

from __future__ import annotations

import sqlite3

import pytest
from cleanruns import PATHS, loss_db
from flag_benches import run, write_bench, write_plan
from sqlalchemy import create_engine

from tonebench.report import stored_sweeps
from tonebench.report.run_page import write_run_report
from tonebench.results import sweeps as results_sweeps
from tonebench.store.database import session_factory


def _no_assessment(*args, **kwargs):
    raise AssertionError("the report assessed the sweep again")


def _pages(tmp_path, db: str, guid: str, monkeypatch) -> tuple[str, str]:
    """(page from the stored results, page from a live assessment) of one run."""
    sessions = session_factory(create_engine(db))
    with monkeypatch.context() as patch:
        patch.setattr(results_sweeps, "assess_sweep", _no_assessment)
        stored = write_run_report(sessions, guid, tmp_path / "stored.html").read_text(encoding="utf-8")
    with monkeypatch.context() as patch:
        patch.setattr(stored_sweeps, "stored_assessment", lambda result, points, flags_by_point: None)
        live = write_run_report(sessions, guid, tmp_path / "live.html").read_text(encoding="utf-8")
    return stored, live


def _residual_set(tmp_path, bench) -> str:
    from tonebench.calibration import workflow

    db = f"sqlite:///{tmp_path / 'runs.db'}"
    files = {}
    for path in PATHS:
        files[path] = tmp_path / f"{path}.csv"
        files[path].write_text("freq_hz,loss_db\n" + "\n".join(f"{f!r},{loss_db(path, f)!r}" for f in (2.3e9, 2.6e9)))
    workflow.import_tables(db, "combiner-cal", files)
    workflow.measure_residual(db, "combiner-cal", bench, write_plan(tmp_path, -34.0, -22.0, atten_db=10.0,
                                                                    name="residual.toml"))
    return "combiner-cal"


@pytest.mark.parametrize("case, words", [
    ("analyzer-limited", ["analyzer-limited (distortion)", "analyzer&#x27;s own IM3"]),
    ("noise-limited", ["IIP3 at least (dBm)", "analyzer-limited (noise)"]),
    ("second order", ["IIP2 (dBm)", "IIP2 +/- (dB)", "slope IM2"]),
    ("source intermod", ["source-intermod-limited", "IIP3 error up to"]),
])
def test_stored_page_is_the_live_page(tmp_path, monkeypatch, case, words):
    cal_name = None
    if case == "analyzer-limited":
        bench = write_bench(tmp_path, mixer_toi_dbm=5.0, declared_toi_dbm=5.0)
        plan = write_plan(tmp_path, -40.0, -28.0, atten_db=0.0)
    elif case == "noise-limited":
        bench, plan = write_bench(tmp_path), write_plan(tmp_path, -60.0, -46.0)
    elif case == "second order":
        bench = write_bench(tmp_path, iip2_dbm=22.0, wide_out=True)
        plan = write_plan(tmp_path, -40.0, -22.0, second_order=True)
    else:
        bench, plan = write_bench(tmp_path, system_ip3_dbm=5.0), write_plan(tmp_path, -34.0, -22.0)
        cal_name = _residual_set(tmp_path, bench)
    outcome, _session, db = run(tmp_path, plan, bench, cal_name=cal_name)
    stored, live = _pages(tmp_path, db, outcome.guid, monkeypatch)
    assert stored == live
    for word in words:
        assert word in stored, word


def _assessed_again(sessions, guid, path, monkeypatch) -> bool:
    with monkeypatch.context() as patch:
        patch.setattr(results_sweeps, "assess_sweep", _no_assessment)
        try:
            write_run_report(sessions, guid, path)
        except AssertionError:
            return True
    return False


def test_points_without_current_results_are_assessed_again(tmp_path, monkeypatch):
    outcome, _session, db = run(tmp_path, write_plan(tmp_path, -34.0, -22.0), write_bench(tmp_path))
    sessions = session_factory(create_engine(db))
    reported = write_run_report(sessions, outcome.guid, tmp_path / "first.html").read_text(encoding="utf-8")
    assert not _assessed_again(sessions, outcome.guid, tmp_path / "probe.html", monkeypatch)

    def edit(sql: str) -> None:
        connection = sqlite3.connect(tmp_path / "runs.db")
        with connection:
            connection.execute(sql)
        connection.close()

    # A point measured after the analysis (a resume stopped before analysing again).
    edit("UPDATE points SET measured_at = '2999-01-01 00:00:00.000000' WHERE id = (SELECT max(id) FROM points)")
    assert _assessed_again(sessions, outcome.guid, tmp_path / "probe.html", monkeypatch)
    # No results at all (a run interrupted before its analysis): the same page as before.
    edit("DELETE FROM result_flags")
    edit("DELETE FROM results")
    assert _assessed_again(sessions, outcome.guid, tmp_path / "probe.html", monkeypatch)
    again = write_run_report(sessions, outcome.guid, tmp_path / "again.html").read_text(encoding="utf-8")
    assert again == reported
