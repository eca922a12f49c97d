"""The run report's sweeps from what `analyze` stored, not assessed again.

Per sweep: the stored points' arrays (results/sweeps.py, as stored or re-referred), and the
stored result read back into the fields the page shows: the fit's numbers (Result columns), its
valid mask and IIP3 lower bound (details_json), the result's and the points' flags (rows, in the
order they were stored). Only when the stored results are not those of the stored points (never
analysed, or points measured after the analysis) is the run assessed again, as `analyze` would.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from tonebench.plan.axes import GROUP_FIELDS
from tonebench.results.sweeps import StoredPoint, assessed_sweeps, point_sweeps
from tonebench.store.models import Point, PointFlag, Result, Run


@dataclass(frozen=True)
class StoredFit:
    """The fields of analysis.sweep_fit.SweepResult the page shows, read back from a Result."""

    n_points: int
    n_valid: int
    valid_mask: np.ndarray
    gain_db: float | None
    iip3_lower_dbm: float | None
    iip3_upper_dbm: float | None
    iip3_dbm: float | None
    oip3_lower_dbm: float | None
    oip3_upper_dbm: float | None
    oip3_dbm: float | None
    iip3_free_dbm: float | None
    slope_fundamental: float | None
    slope_im3_lower: float | None
    slope_im3_upper: float | None
    p1db_in_dbm: float | None
    p1db_out_dbm: float | None
    reason: str | None


@dataclass(frozen=True)
class StoredSecondOrder:
    iip2_dbm: float | None
    bound_db: float | None
    slope_im2: float | None


@dataclass(frozen=True)
class StoredAssessment:
    """The fields of analysis.assess.SweepAssessment the page shows; flags are the stored rows
    (PointFlag per point, ResultFlag), which carry the same flag, cause, detail and error_db."""

    fit: StoredFit
    point_flags: list[list]
    result_flags: list
    iip3_bound_db: float | None
    iip3_at_least_dbm: float | None
    second_order: StoredSecondOrder | None
    notes: list[str]
    bound_terms_db: dict[str, float]

    @property
    def flagged_mask(self) -> np.ndarray:
        return np.array([bool(f) for f in self.point_flags], dtype=bool)


def _by_id(rows) -> list:
    return sorted(rows, key=lambda row: row.id)


def stored_assessment(result: Result | None, points: list[StoredPoint],
                      flags_by_point: dict[int, list[PointFlag]]) -> StoredAssessment | None:
    """The stored assessment of one sweep, or None when `result` is not that of these points."""
    details = (result.details_json or {}) if result is not None else {}
    mask = details.get("valid_mask")
    if result is None or mask is None or len(mask) != len(points) or result.n_points != len(points):
        return None
    fit = StoredFit(
        n_points=result.n_points, n_valid=result.n_valid, valid_mask=np.array(mask, dtype=bool),
        gain_db=result.gain_db, iip3_lower_dbm=result.iip3_lower_dbm, iip3_upper_dbm=result.iip3_upper_dbm,
        iip3_dbm=result.iip3_dbm, oip3_lower_dbm=result.oip3_lower_dbm, oip3_upper_dbm=result.oip3_upper_dbm,
        oip3_dbm=result.oip3_dbm, iip3_free_dbm=details.get("iip3_free_slopes_dbm"),
        slope_fundamental=result.slope_fundamental, slope_im3_lower=result.slope_im3_lower,
        slope_im3_upper=result.slope_im3_upper, p1db_in_dbm=result.p1db_in_dbm, p1db_out_dbm=result.p1db_out_dbm,
        reason=result.reason,
    )
    second = details.get("second_order")
    return StoredAssessment(
        fit=fit,
        point_flags=[_by_id(flags_by_point.get(point.id, [])) for point in points],
        result_flags=_by_id(result.flags),
        iip3_bound_db=result.iip3_bound_db,
        iip3_at_least_dbm=details.get("iip3_at_least_dbm"),
        second_order=None if second is None else StoredSecondOrder(result.iip2_dbm, second.get("bound_db"),
                                                                    result.slope_im2),
        notes=list(details.get("notes") or []),
        bound_terms_db=dict(details.get("bound_terms_db") or {}),
    )


def _analysed_after_points(session: Session, run: Run, results: list[Result]) -> bool:
    latest = session.scalar(select(func.max(Point.measured_at)).where(Point.run_id == run.id, Point.status == "measured"))
    return latest is None or all(r.created_at is not None and r.created_at >= latest for r in results)


def _point_flags(session: Session, run: Run) -> dict[int, list[PointFlag]]:
    flags: dict[int, list[PointFlag]] = defaultdict(list)
    for flag in session.scalars(select(PointFlag).join(Point, PointFlag.point_id == Point.id).where(Point.run_id == run.id)):
        flags[flag.point_id].append(flag)
    return flags


def report_sweeps(session: Session, run: Run, set_id: int | None, tables: dict | None):
    """(group axis values, arrays, assessment) per sweep (report_sweeps_with_points without the points)."""
    for group, _points, arrays, assessment in report_sweeps_with_points(session, run, set_id, tables):
        yield group, arrays, assessment


def report_sweeps_with_points(session: Session, run: Run, set_id: int | None, tables: dict | None):
    """(group axis values, stored points, arrays, assessment) per sweep: the stored assessment
    when the run's stored results are those of its stored points, else the run assessed again."""
    sweeps = list(point_sweeps(session, run.id, tables))
    results = {tuple(getattr(r, name) for name in GROUP_FIELDS): r for r in run.results}
    flags_by_point = _point_flags(session, run)
    stored = [stored_assessment(results.get(tuple(group.values())), rows, flags_by_point) for group, rows, _ in sweeps]
    if len(results) == len(sweeps) and None not in stored and _analysed_after_points(session, run, list(results.values())):
        for (group, rows, arrays), assessment in zip(sweeps, stored):
            yield group, rows, arrays, assessment
        return
    yield from assessed_sweeps(session, run, set_id, tables)
