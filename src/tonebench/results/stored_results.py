"""Analysis outputs back into the store: one run's results, point and result flags, and verdicts."""

from __future__ import annotations

import math

from sqlalchemy import delete, select
from sqlalchemy.orm import sessionmaker

from tonebench.results.sweeps import assessed_sweeps, referral_tables
from tonebench.store.lookups import find_run
from tonebench.analysis.assess import (
    SweepAssessment,
)
from tonebench.catalog.limits import apply_verdicts
from tonebench.store.models import (
    Device,
    Point,
    PointFlag,
    Result,
    ResultFlag,
    Run,
    utc_now,
)


def _finite_or_none(value):
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _flag_row(cls, flag, **key):
    error_db = flag.error_db if flag.error_db is not None and math.isfinite(flag.error_db) else None
    return cls(flag=flag.flag, cause=flag.cause, detail=flag.detail, error_db=error_db, **key)


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


def analyze_run(sessions: sessionmaker, run_guid: str, cal_name: str | None = None) -> list[Result]:
    """Fit every sweep of a run, flag its points and results, and replace what was stored.

    cal_name re-refers the stored raw readings to that calibration set first (no measuring);
    the results record the set they were referred with, and its system residual is the one the
    source-intermod check uses. The points themselves stay as measured; their flags are replaced.
    """
    with sessions.begin() as session:
        run = find_run(session, run_guid)
        set_id, tables = referral_tables(session, run, cal_name)
        point_ids = select(Point.id).where(Point.run_id == run.id)
        result_ids = select(Result.id).where(Result.run_id == run.id)
        session.execute(delete(PointFlag).where(PointFlag.point_id.in_(point_ids)))
        session.execute(delete(ResultFlag).where(ResultFlag.result_id.in_(result_ids)))
        session.execute(delete(Result).where(Result.run_id == run.id))
        results = []
        for group, rows, _arrays, a in assessed_sweeps(session, run, set_id, tables):
            fit, second = a.fit, a.second_order
            for row, flags in zip(rows, a.point_flags):
                session.add_all(_flag_row(PointFlag, f, point_id=row.id) for f in flags)
            result = Result(
                run_id=run.id,
                **group,
                n_points=fit.n_points,
                n_valid=fit.n_valid,
                gain_db=_finite_or_none(fit.gain_db),
                iip3_lower_dbm=_finite_or_none(fit.iip3_lower_dbm),
                iip3_upper_dbm=_finite_or_none(fit.iip3_upper_dbm),
                iip3_dbm=_finite_or_none(fit.iip3_dbm),
                oip3_lower_dbm=_finite_or_none(fit.oip3_lower_dbm),
                oip3_upper_dbm=_finite_or_none(fit.oip3_upper_dbm),
                oip3_dbm=_finite_or_none(fit.oip3_dbm),
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
            result.flags = [_flag_row(ResultFlag, f) for f in a.result_flags]
            results.append(result)
        session.add_all(results)
        # Spec-limit verdicts belong to the results just stored (design: stored per result).
        apply_verdicts(session, run.id)
    return results
