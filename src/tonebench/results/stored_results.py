"""Analysis outputs back into the store: one run's results, point and result flags, and verdicts."""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from functools import partial

import sqlalchemy as sa
from sqlalchemy import delete, select
from sqlalchemy.orm import Session, selectinload, sessionmaker

from tonebench.analysis.assess import SweepAssessment, assess_sweeps
from tonebench.analysis.conventions import reported_intercepts
from tonebench.catalog.limits import apply_verdicts
from tonebench.errors import InputError
from tonebench.results.batch_pool import AnalysedBatch, analysed_batches
from tonebench.results.levels import (
    LEVEL_INPUTS,
    level_accuracy_db,
    level_reason,
    level_rows,
    run_choice,
)
from tonebench.results.sweeps import (
    analysis_points,
    analysis_settings,
    assessed_sweeps,
    batch_sweeps,
    referral_tables,
)
from tonebench.store.lookups import find_run
from tonebench.store.models import (
    CalibrationSet,
    Device,
    LevelResult,
    Point,
    PointFlag,
    Result,
    ResultFlag,
    Run,
    result_group_key,
    utc_now,
)


def _finite_or_none(value):
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _flag_values(flag, **key) -> dict:
    return dict(flag=flag.flag, cause=flag.cause, detail=flag.detail, error_db=_finite_or_none(flag.error_db), **key)


def _details(a: SweepAssessment) -> dict:
    second = a.second_order
    return {
        "valid_mask": [bool(v) for v in a.fit.valid_mask],
        "bound_terms_db": a.bound_terms_db,
        "notes": a.notes,
        "iip3_at_least_dbm": _finite_or_none(a.iip3_at_least_dbm),
        "iip3_free_slopes_dbm": _finite_or_none(a.fit.iip3_free_dbm),
        "effective_mixer_toi_dbm": _finite_or_none(a.effective_mixer_toi_dbm),
        "step_change_db": [_finite_or_none(v) for v in a.step_change_db],
        "second_order": None if second is None else {
            "bound_db": second.bound_db, "reason": second.reason, "per_product": second.per_product},
    }


def finished_runs(sessions: sessionmaker, parts: tuple[str, ...] = (), lots: tuple[str, ...] = ()) -> list[str]:
    """GUIDs of the runs with measured points that no process is measuring (oldest first), of
    these part numbers and lots when given: what `analyze --all` goes through."""
    query = (select(Run.guid).join(Device, Device.id == Run.device_id).where(Run.status != "running")
             .where(select(Point.id).where(Point.run_id == Run.id, Point.status == "measured").exists())
             .order_by(Run.id))
    if parts:
        query = query.where(Device.part_number.in_(parts))
    if lots:
        query = query.where(Device.lot.in_(lots))
    with sessions() as session:
        return list(session.scalars(query))


RUNS_PER_TRANSACTION = 200  # re-analysis of many runs: one read, one write and one commit per this many


def analyze_run(sessions: sessionmaker, run_guid: str, cal_name: str | None = None) -> list[Result]:
    """Fit every sweep of a run, flag its points and results, and replace what was stored.

    cal_name re-refers the stored raw readings to that calibration set first (no measuring);
    the results record the set they were referred with, and its system residual is the one the
    source-intermod check uses. The points themselves stay as measured; their flags are replaced.
    """
    with sessions() as session:
        run = find_run(session, run_guid)
        run_id, run_guid = run.id, run.guid
    analyze_runs(sessions, [run_guid], cal_name)
    with sessions() as session:
        return list(session.scalars(select(Result).where(Result.run_id == run_id)
                                    .options(selectinload(Result.flags)).order_by(Result.id)))


def analyze_runs(sessions: sessionmaker, run_guids: list[str], cal_name: str | None = None,
                 on_progress: Callable[[int, int], None] | None = None) -> int:
    """analyze_run for many runs (full GUIDs) in one process, RUNS_PER_TRANSACTION at a time: their points
    read in one query with only the analysis columns, results and flags written with bulk
    inserts, verdicts judged once per batch. Returns the number of results stored;
    on_progress(done, total) after each run."""
    batches = [run_guids[first:first + RUNS_PER_TRANSACTION] for first in range(0, len(run_guids), RUNS_PER_TRANSACTION)]
    stored = done = 0
    with analysed_batches(sessions, batches, cal_name, analyse_batch) as analysed:
        for batch in analysed:
            with sessions.begin() as session:
                stored += _store_batch(session, batch)
            for _ in batch.run_ids:
                done += 1
                if on_progress is not None:
                    on_progress(done, len(run_guids))
    return stored


def analyse_batch(session: Session, guids: list[str], cal_name: str | None) -> AnalysedBatch:
    """Read and assess the runs of one batch (nothing written); InputError for an unknown GUID."""
    by_guid = {run.guid: run for run in session.scalars(select(Run).where(Run.guid.in_(guids)))}
    missing = [guid for guid in guids if guid not in by_guid]
    if missing:
        raise InputError(f"run '{missing[0]}': no run with that GUID in this database (see `tonebench runs`)")
    runs = [by_guid[guid] for guid in guids]
    batch = AnalysedBatch([run.id for run in runs], [], [], [], [])
    choices = {run.id: (*run_choice(run), level_accuracy_db(run)) for run in runs}

    def add(run_id, group, point_ids, a, set_id, arrays):
        convention, per_level, accuracy_db = choices[run_id]
        for point_id, flags in zip(point_ids, a.point_flags):
            batch.point_flags.extend(_flag_values(f, point_id=point_id) for f in flags)
        result = _result_values(run_id, group, a, set_id, convention)
        result["reason"] = level_reason(result["reason"], per_level)
        batch.results.append(result)
        batch.result_flags.append([_flag_values(f) for f in a.result_flags])
        # IMD per drive level, when the run's plan asks (results/levels.py).
        batch.levels.append(level_rows(point_ids, arrays(), a, accuracy_db, convention) if per_level else [])

    if cal_name is None:
        # As stored: the whole batch's points built into arrays at once (results/sweeps.py).
        data, sweeps = batch_sweeps(session, batch.run_ids)
        if data is None:
            return batch
        run_of = {run.id: run for run in runs}
        position = {run.id: i for i, run in enumerate(runs)}
        sweeps.sort(key=lambda s: position[s.run_id])  # results stored in the batch's run order (stable)
        cals = {set_id: session.get(CalibrationSet, set_id) for set_id in {run.calibration_set_id for run in runs}
                if set_id is not None}
        settings = [analysis_settings(run_of[s.run_id], cals.get(run_of[s.run_id].calibration_set_id),
                                      s.group["center_hz"], s.group["spacing_hz"]) for s in sweeps]
        for sweep, a in zip(sweeps, assess_sweeps(data, [s.points for s in sweeps], settings)):
            add(sweep.run_id, sweep.group, sweep.point_ids, a, run_of[sweep.run_id].calibration_set_id,
                partial(_sweep_arrays, data, sweep.points))
        return batch
    points = analysis_points(session, batch.run_ids)
    for run in runs:
        set_id, tables = referral_tables(session, run, cal_name, points[run.id])
        for group, stored_rows, arrays, a in assessed_sweeps(session, run, set_id, tables, points[run.id]):
            add(run.id, group, [row.id for row in stored_rows], a, set_id, lambda arrays=arrays: arrays)
    return batch


def _sweep_arrays(data, points: slice) -> dict:
    """One sweep's arrays by name, cut from a batch's column arrays (what level_rows reads)."""
    return {name: getattr(data, name)[points] for name in LEVEL_INPUTS}


def _store_batch(session: Session, batch: AnalysedBatch) -> int:
    """Replace the batch's runs' results and flags with the analysed ones; judge their verdicts."""
    _forget_analysis(session, batch.run_ids)
    result_flags, levels = [], []
    # Core inserts of whole rows: one statement per table (the ORM's bulk insert splits
    # rows by which values are None, one statement each).
    if batch.results:
        ids = _insert_results(session, batch.results)
        result_flags = [{**f, "result_id": result_id} for result_id, flags in zip(ids, batch.result_flags)
                        for f in flags]
        levels = [{**row, "result_id": result_id} for result_id, rows in zip(ids, batch.levels) for row in rows]
    for cls, rows in ((PointFlag, batch.point_flags), (ResultFlag, result_flags), (LevelResult, levels)):
        if rows:
            _insert_flags(session, cls.__table__, rows)
    # Spec-limit verdicts belong to the results just stored (design: stored per result).
    apply_verdicts(session, run_ids=batch.run_ids)
    return len(batch.results)


def _copies(session: Session) -> bool:
    """Whether rows go in by COPY: PostgreSQL through psycopg. There SQLAlchemy's multi-row
    INSERTs (rendered, then bound by psycopg) took most of a batch's write, and that write is the
    one serial step of a re-analysis with workers."""
    dialect = session.connection().dialect
    return dialect.name == "postgresql" and dialect.driver == "psycopg"


def _insert_results(session: Session, rows: list[dict]) -> list[int]:
    """Insert result rows; their ids, in the rows' order."""
    table = Result.__table__
    if not _copies(session):
        return list(session.scalars(sa.insert(table).returning(table.c.id, sort_by_parameter_order=True), rows))
    # Ids drawn from the table's own sequence first, so COPY can carry them (it returns none).
    with session.connection().connection.driver_connection.cursor() as cursor:
        cursor.execute("SELECT nextval(pg_get_serial_sequence('results', 'id')) FROM generate_series(1, %s)",
                       (len(rows),))
        ids = sorted(row[0] for row in cursor.fetchall())
    _copy_rows(session, table, [{"id": result_id, **row} for result_id, row in zip(ids, rows)])
    return ids


def _insert_flags(session: Session, table: sa.Table, rows: list[dict]) -> None:
    """Insert flag rows (dozens of point flags per run)."""
    if _copies(session):
        _copy_rows(session, table, rows)
    else:
        session.execute(sa.insert(table), rows)


def _copy_rows(session: Session, table: sa.Table, rows: list[dict]) -> None:
    """COPY rows (every one with the same keys) into the table, in the session's transaction; JSON
    columns as json.dumps text, what SQLAlchemy's insert sends for them."""
    names = list(rows[0])
    as_json = [isinstance(table.c[name].type, sa.JSON) for name in names]
    columns = ", ".join(table.c[name].name for name in names)  # the table's own names, nothing typed
    with (session.connection().connection.driver_connection.cursor() as cursor,
          cursor.copy(f"COPY {table.name} ({columns}) FROM STDIN") as copy):
        for row in rows:
            copy.write_row([json.dumps(row[name]) if is_json else row[name] for name, is_json in zip(names, as_json)])


def _forget_analysis(session: Session, run_ids: list[int]) -> None:
    """Delete the runs' results and point and result flags (the analysis replaces them all)."""
    point_ids = select(Point.id).where(Point.run_id.in_(run_ids))
    result_ids = select(Result.id).where(Result.run_id.in_(run_ids))
    session.execute(delete(PointFlag).where(PointFlag.point_id.in_(point_ids)))
    session.execute(delete(ResultFlag).where(ResultFlag.result_id.in_(result_ids)))
    session.execute(delete(LevelResult).where(LevelResult.result_id.in_(result_ids)))
    session.execute(delete(Result).where(Result.run_id.in_(run_ids)))


def _result_values(run_id: int, group: dict, a: SweepAssessment, set_id: int | None,
                   convention: str = "mean") -> dict:
    fit, second = a.fit, a.second_order
    # Lower and upper are always stored; the reported pair follows the run's convention.
    iip3_dbm, oip3_dbm = reported_intercepts(fit.iip3_lower_dbm, fit.iip3_upper_dbm, fit.oip3_lower_dbm,
                                             fit.oip3_upper_dbm, convention)
    return dict(
        run_id=run_id,
        **group,
        # The insert is a bulk one: the ORM's before-insert hook does not fill the key.
        group_key=result_group_key(**group),  # group: every group axis by point field
        n_points=fit.n_points,
        n_valid=fit.n_valid,
        gain_db=_finite_or_none(fit.gain_db),
        iip3_lower_dbm=_finite_or_none(fit.iip3_lower_dbm),
        iip3_upper_dbm=_finite_or_none(fit.iip3_upper_dbm),
        iip3_dbm=_finite_or_none(iip3_dbm),
        intercept_convention=convention,
        oip3_lower_dbm=_finite_or_none(fit.oip3_lower_dbm),
        oip3_upper_dbm=_finite_or_none(fit.oip3_upper_dbm),
        oip3_dbm=_finite_or_none(oip3_dbm),
        slope_fundamental=_finite_or_none(fit.slope_fundamental),
        slope_im3_lower=_finite_or_none(fit.slope_im3_lower),
        slope_im3_upper=_finite_or_none(fit.slope_im3_upper),
        p1db_in_dbm=_finite_or_none(fit.p1db_in_dbm),
        p1db_out_dbm=_finite_or_none(fit.p1db_out_dbm),
        iip3_bound_db=_finite_or_none(a.iip3_bound_db),
        iip2_dbm=None if second is None else _finite_or_none(second.iip2_dbm),
        oip2_dbm=None if second is None else _finite_or_none(second.oip2_dbm),
        slope_im2=None if second is None else _finite_or_none(second.slope_im2),
        valid_tone_min_dbm=_finite_or_none(fit.valid_tone_min_dbm),
        valid_tone_max_dbm=_finite_or_none(fit.valid_tone_max_dbm),
        reason=fit.reason,
        details_json=_details(a),
        calibration_set_id=set_id,
        created_at=utc_now(),
    )
