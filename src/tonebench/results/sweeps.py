"""Stored points to analysis inputs: per sweep, the arrays the fit takes (as stored, or re-referred
to another calibration set from the raw readings) and what the analysis knows of the test system."""

from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import groupby

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from tonebench.analysis import detectors
from tonebench.analysis.assess import (
    DEFAULT_LEVEL_ACCURACY_DB,
    AnalysisSettings,
    SweepData,
    assess_sweep,
)
from tonebench.calibration.residual import check_shares
from tonebench.calibration.sets import load_set
from tonebench.errors import InputError
from tonebench.plan.axes import GROUP_FIELDS, group_of, sweep_key_of
from tonebench.planes.loss_table import LossTable
from tonebench.planes.referral import (
    OUTPUT_COLUMNS,
    check_coverage,
    point_offsets,
    referred_values,
)
from tonebench.store.models import CalibrationSet, Point, Run
from tonebench.store.point_record import PointRecord, record_of
from tonebench.units import format_freq

POINT_ARRAYS = (
    "tone_dbm", "pin1_dbm", "pin2_dbm", "pout_f1_dbm", "pout_f2_dbm", "im3_lower_dbm",
    "im3_upper_dbm", "noise_lower_dbm", "noise_upper_dbm", "overload", "im2_diff_dbm", "im2_sum_dbm",
)


# Raw columns the flags need as read (analyzer input plane), never re-referred.
RAW_ARRAYS = (
    "atten_db", "raw_f1_dbm", "raw_f2_dbm", "raw_lower_dbm", "raw_upper_dbm", "raw_noise_lower_dbm",
    "raw_noise_upper_dbm", "step_atten_db", "raw_lower_step_dbm", "raw_upper_step_dbm", "raw_diff_dbm",
    "raw_sum_dbm",
)


# Kept in Point.extra_json by the sequencer (no columns of their own).
EXTRA_ARRAYS = ("raw_noise_lower_step_dbm", "raw_noise_upper_step_dbm", "raw_noise_diff_dbm", "raw_noise_sum_dbm")


# What re-referring a point needs: its source settings, leveling and raw readings.
_REFERRAL_INPUTS = (
    "source1_dbm", "source2_dbm", "source1_correction_db", "source2_correction_db", "pin1_dbm", "pin2_dbm",
    *(raw for raw, _ in OUTPUT_COLUMNS.values()),
)


# The point columns the analysis reads (re-analysis of many runs loads only these).
ANALYSIS_FIELDS = tuple(dict.fromkeys((
    *GROUP_FIELDS, "tone_dbm", "f1_hz", "f2_hz", "raw_diff_dbm", "extra_json", "rbw_hz",
    *POINT_ARRAYS, *RAW_ARRAYS, *_REFERRAL_INPUTS)))

# Sweep by sweep, tone power up.
_SWEEP_ORDER = (Point.temperature_c, Point.lo_dbm, Point.center_hz, Point.spacing_hz, Point.bias_v, Point.tone_dbm)


@dataclass(frozen=True)
class StoredPoint:
    """A measured point read back: its row id (which point flags refer to) and its record (a
    PointRecord, or for re-analysis a row holding the ANALYSIS_FIELDS)."""

    id: int
    record: PointRecord


def stored_points(session: Session, run_id: int) -> list[StoredPoint]:
    """The run's measured points, sweep by sweep, tone power up: the one way results read points."""
    rows = session.scalars(
        select(Point).where(Point.run_id == run_id, Point.status == "measured").order_by(*_SWEEP_ORDER)
    ).all()
    return [StoredPoint(row.id, record_of(row)) for row in rows]


def analysis_points(session: Session, run_ids: list[int]) -> dict[int, list[StoredPoint]]:
    """The measured points of several runs with only the columns the analysis reads, per run id,
    in stored_points' order: one query for many runs, no ORM objects."""
    columns = [Point.id, Point.run_id, *(getattr(Point, name) for name in ANALYSIS_FIELDS)]
    per_run: dict[int, list[StoredPoint]] = {run_id: [] for run_id in run_ids}
    rows = session.execute(select(*columns).where(Point.run_id.in_(run_ids), Point.status == "measured")
                           .order_by(Point.run_id, *_SWEEP_ORDER))
    for row in rows:
        per_run[row.run_id].append(StoredPoint(row.id, row))
    return per_run


# Re-analysis as stored reads each batch's points into one float matrix: the numeric columns
# (group axes first), with the row id, run id, overload and extra_json kept as Python values.
# Only what the analysis reads as stored: no tone frequencies or source settings (re-referral's).
_MATRIX_FIELDS = tuple(dict.fromkeys((
    *GROUP_FIELDS, *(name for name in POINT_ARRAYS if name != "overload"), *RAW_ARRAYS, "rbw_hz")))
_COLUMN = {name: i for i, name in enumerate(_MATRIX_FIELDS)}


@dataclass(frozen=True)
class BatchSweep:
    """One sweep of a batch read for re-analysis as stored: its run, its value on every group axis,
    its points' row ids (tone power up) and its slice of the batch's points."""

    run_id: int
    group: dict[str, float | None]
    point_ids: list[int]
    points: slice


def batch_sweeps(session: Session, run_ids: list[int]) -> tuple[SweepData | None, list[BatchSweep]]:
    """The runs' measured points as stored (no re-referral), from one query: the analysis input of
    all of them back to back (None without points) and each sweep's slice, run by run.

    The same values as point_sweeps + sweep_data, built column by column for the whole batch
    instead of point by point (a float column of NaN for None; overload False for None)."""
    fields = ("extra_json", "overload", *_MATRIX_FIELDS)
    columns = [Point.id, Point.run_id, *(getattr(Point, name) for name in fields)]
    rows = [tuple(row) for row in session.execute(
        select(*columns).where(Point.run_id.in_(run_ids), Point.status == "measured")
        .order_by(Point.run_id, *_SWEEP_ORDER))]
    if not rows:
        return None, []
    first = 4  # id, run_id, extra_json, overload
    matrix = np.array([row[first:] for row in rows], dtype=float)
    # Column-major so that each sweep's slice of a column is contiguous, as its own array was.
    cols = {name: np.ascontiguousarray(matrix[:, i]) for name, i in _COLUMN.items()}
    cols["overload"] = np.array([bool(row[3]) for row in rows], dtype=bool)
    extras = [row[2] or {} for row in rows]
    for name in EXTRA_ARRAYS:
        cols[name] = _nan_array(extra.get(name) for extra in extras) if any(extras) else np.full(len(rows), np.nan)
    # A second-order product's noise floor has the same output loss as the product (sweep_data).
    noise = {side: cols[f"raw_noise_{side}_dbm"] + cols[f"im2_{side}_dbm"] - cols[f"raw_{side}_dbm"]
             for side in ("diff", "sum")}
    values = {**{name: cols[name] for name in (*POINT_ARRAYS, *RAW_ARRAYS)},
              "raw_noise_lower_step_dbm": cols["raw_noise_lower_step_dbm"],
              "raw_noise_upper_step_dbm": cols["raw_noise_upper_step_dbm"],
              "noise_diff_dbm": noise["diff"], "noise_sum_dbm": noise["sum"]}
    # As sweep_data: biased detector modes made power readings, peak-detected noise marked.
    detector, average_type = detectors.modes_of(extras)
    # The products' RBW: a read narrowed to reach its target keeps its own (point_build.py).
    rbw = np.array([extra.get("im3_rbw_hz", rbw_hz) for extra, rbw_hz in zip(extras, cols["rbw_hz"])], dtype=float)
    data = SweepData(**detectors.as_power_readings(values, detector, average_type), rbw_hz=rbw,
                     noise_peak_detected=detectors.peak_mask(detector),
                     noise_log_rms=detectors.log_rms_mask(detector, average_type))
    group_at = [first + _COLUMN[name] for name in GROUP_FIELDS]
    # A sweep starts where the run or any group axis changes from the point before (None, NaN
    # in the columns, equal to None), found over the columns instead of row by row.
    point_ids = [row[0] for row in rows]
    run_col = np.array([row[1] for row in rows])
    change = np.ones(len(rows), bool)
    change[1:] = run_col[1:] != run_col[:-1]
    for name in GROUP_FIELDS:
        col = cols[name]
        both_none = np.isnan(col[1:]) & np.isnan(col[:-1])
        change[1:] |= (col[1:] != col[:-1]) & ~both_none
    bounds = [*np.flatnonzero(change).tolist(), len(rows)]
    sweeps = []
    for start, stop in zip(bounds[:-1], bounds[1:]):
        row = rows[start]
        sweeps.append(BatchSweep(row[1], {name: row[i] for name, i in zip(GROUP_FIELDS, group_at)},
                                 point_ids[start:stop], slice(start, stop)))
    return data, sweeps


def rereferred(point: PointRecord | Point, tables: dict[str, LossTable]) -> dict[str, float | None]:
    """The point's DUT-referred values with another set's path losses, from its raw readings."""
    offsets = point_offsets(tables, point.f1_hz, point.f2_hz, second_order=point.raw_diff_dbm is not None)
    return referred_values({name: getattr(point, name) for name in _REFERRAL_INPUTS}, offsets)


def point_sweeps(session: Session, run_id: int, tables: dict[str, LossTable] | None = None,
                 points: list[StoredPoint] | None = None):
    """Per sweep, (its value on every group axis as point field -> value, stored points, arrays
    the fit takes): as stored, or re-referred to `tables` when given. `points` are the run's
    stored points when the caller has read them already."""
    points = stored_points(session, run_id) if points is None else points
    for key, group in groupby(points, key=lambda p: sweep_key_of(p.record)):
        stored = list(group)
        records = [p.record for p in stored]
        values = [rereferred(record, tables) if tables is not None else None for record in records]

        def column(name: str, records=records, values=values):
            if tables is not None and name in values[0]:
                return [v[name] for v in values]
            return [getattr(record, name) for record in records]

        arrays = {name: _nan_array(column(name)) for name in POINT_ARRAYS if name != "overload"}
        arrays["overload"] = np.array([bool(v) for v in column("overload")], dtype=bool)
        yield group_of(key), stored, arrays


def _nan_array(values) -> np.ndarray:
    return np.array(list(values), dtype=float)  # None -> NaN


def sweep_data(records: list[PointRecord], arrays: dict[str, np.ndarray]) -> SweepData:
    """The analysis input of one sweep: its (possibly re-referred) arrays plus the raw readings."""
    raw = {name: _nan_array(getattr(record, name) for record in records) for name in RAW_ARRAYS}
    extra = {name: _nan_array((record.extra_json or {}).get(name) for record in records) for name in EXTRA_ARRAYS}
    # A second-order product's noise floor has the same output loss as the product.
    noise = {side: extra[f"raw_noise_{side}_dbm"] + arrays[f"im2_{side}_dbm"]
             - _nan_array(getattr(record, f"raw_{side}_dbm") for record in records) for side in ("diff", "sum")}
    values = {**arrays, **raw, "raw_noise_lower_step_dbm": extra["raw_noise_lower_step_dbm"],
              "raw_noise_upper_step_dbm": extra["raw_noise_upper_step_dbm"],
              "noise_diff_dbm": noise["diff"], "noise_sum_dbm": noise["sum"]}
    # Readings of a biased detector mode made power readings; peak-detected noise marked (analysis/detectors.py).
    detector, average_type = detectors.modes_of([record.extra_json or {} for record in records])
    # The products' RBW: a read narrowed to reach its target keeps its own (point_build.py).
    rbw = _nan_array((record.extra_json or {}).get("im3_rbw_hz", record.rbw_hz) for record in records)
    return SweepData(**detectors.as_power_readings(values, detector, average_type), rbw_hz=rbw,
                     noise_peak_detected=detectors.peak_mask(detector),
                     noise_log_rms=detectors.log_rms_mask(detector, average_type))


def _residual_shares(cal: CalibrationSet | None, center_hz: float, spacing_hz: float) -> tuple[dict, str | None]:
    """The system residual the source-intermod check charges one sweep with (AnalysisSettings
    fields), or no fields and why not. The nearest centre measured at this spacing is used.

    The sources' share is what a DUT passes on with its gain; a share the thru could not resolve
    is charged at its bound, and the analyzer's share with the attenuation of each point
    (calibration/residual.py check_shares). A set without the split gives the whole system's,
    which can only overstate the sources'.
    """
    if cal is None:
        return {}, "the run has no calibration set"
    same = [r for r in cal.residuals if math.isclose(r.spacing_hz, spacing_hz, rel_tol=1e-9)]
    if not same:
        return {}, f"calibration set {cal.name} has no system residual at {format_freq(spacing_hz)} spacing"
    row = min(same, key=lambda r: abs(r.center_hz - center_hz))
    extra = row.sweep_json or {}
    shares = check_shares(row.system_ip3_dbm, row.source_ip3_dbm, row.analyzer_ip3_dbm, row.atten_db,
                          extra.get("source_ip3_min_dbm"), extra.get("analyzer_ip3_min_dbm"),
                          split_known=row.source_ip3_dbm is not None or row.analyzer_ip3_dbm is not None
                          or "source_ip3_min_dbm" in extra)
    if shares is None:
        return {}, f"calibration set {cal.name}: the residual at {format_freq(row.center_hz)} was below its noise"
    return {"system_ip3_dbm": float(row.system_ip3_dbm), "source_ip3_dbm": shares.source_ip3_dbm,
            "source_ip3_is_bound": shares.source_is_bound, "analyzer_ip3_dbm": shares.analyzer_ip3_dbm,
            "residual_atten_db": float(shares.atten_db)}, None


def analysis_settings(run: Run, cal: CalibrationSet | None, center_hz: float, spacing_hz: float) -> AnalysisSettings:
    """What the analysis knows of this run's test system: the analyzer's figures kept with the run,
    and the system residual of the calibration set the results are referred with."""
    figures = (run.metadata_json or {}).get("analyzer", {})
    shares, note = _residual_shares(cal, center_hz, spacing_hz)
    return AnalysisSettings(
        level_accuracy_db=figures.get("level_accuracy_db", DEFAULT_LEVEL_ACCURACY_DB),
        mixer_toi_dbm=figures.get("mixer_toi_dbm"),
        mixer_shi_dbm=figures.get("mixer_shi_dbm"),
        max_mixer_dbm=figures.get("max_mixer_dbm"),
        phase_noise_dbc_per_hz=figures.get("phase_noise_dbc_per_hz"),
        phase_noise_offset_hz=figures.get("phase_noise_offset_hz"),
        spacing_hz=spacing_hz,
        system_note=note,
        **shares,
    )


def assessed_sweeps(session: Session, run: Run, set_id: int | None, tables: dict | None,
                    points: list[StoredPoint] | None = None):
    """(group axis values, stored points, arrays, assessment) for each sweep of the run."""
    cal = session.get(CalibrationSet, set_id) if set_id is not None else None
    for group, stored, arrays in point_sweeps(session, run.id, tables, points):
        data = sweep_data([p.record for p in stored], arrays)
        assessment = assess_sweep(data, analysis_settings(run, cal, group["center_hz"], group["spacing_hz"]))
        yield group, stored, arrays, assessment


def referral_tables(session: Session, run: Run, cal_name: str | None,
                    points: list[StoredPoint] | None = None) -> tuple[int | None, dict | None]:
    """(calibration set id, tables to re-refer with or None to use the points as stored)."""
    if cal_name is None:
        return run.calibration_set_id, None
    if "mixer" in (run.metadata_json or {}):
        # Its output losses belong at the IF (run/mixer_run.py); rereferred() takes them at the RF.
        raise InputError(f"run {run.guid[:8]}: a mixer run (read at the IF) cannot be re-referred to another "
                         "calibration set yet; analyze it without --cal")
    view = load_set(session, cal_name)
    points = stored_points(session, run.id) if points is None else points
    pairs = sorted({(p.record.f1_hz, p.record.f2_hz) for p in points})
    check_coverage(view.tables, pairs, f"run {run.guid[:8]}: {view.label}")
    if view.id == run.calibration_set_id:
        return view.id, None
    return view.id, view.tables
