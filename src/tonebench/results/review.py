"""From stored points to stored results and a report: the glue between store and analysis."""

from __future__ import annotations

import math
from itertools import groupby
from pathlib import Path

import numpy as np
from sqlalchemy import delete, select
from sqlalchemy.orm import Session, sessionmaker

from tonebench.analysis.assess import (
    DEFAULT_LEVEL_ACCURACY_DB,
    AnalysisSettings,
    SweepAssessment,
    SweepData,
    assess_sweep,
)
from tonebench.planes.referral import (
    OUTPUT_COLUMNS,
    check_coverage,
    point_offsets,
    referred_values,
)
from tonebench.calibration.residual import check_shares
from tonebench.calibration.sets import load_set, load_set_by_id
from tonebench.catalog.limits import apply_verdicts
from tonebench.errors import InputError
from tonebench.planes.loss_table import LossTable
from tonebench.report.run_report import SweepPlotData, sweep_title, write_report
from tonebench.report.run_report import result_row as report_result_row
from tonebench.store.models import (
    CalibrationSet,
    Point,
    PointFlag,
    Result,
    ResultFlag,
    Run,
    utc_now,
)

POINT_ARRAYS = (
    "tone_dbm", "pin1_dbm", "pin2_dbm", "pout_f1_dbm", "pout_f2_dbm", "im3_lower_dbm",
    "im3_upper_dbm", "noise_lower_dbm", "noise_upper_dbm", "overload", "im2_diff_dbm", "im2_sum_dbm",
)
# Raw columns the flags need as read (analyzer input plane), never re-referred.
RAW_ARRAYS = (
    "atten_db", "raw_f1_dbm", "raw_f2_dbm", "raw_lower_dbm", "raw_upper_dbm", "raw_noise_lower_dbm",
    "raw_noise_upper_dbm", "step_atten_db", "raw_lower_step_dbm", "raw_upper_step_dbm",
)
# Kept in Point.extra_json by the sequencer (no columns of their own).
EXTRA_ARRAYS = ("raw_noise_lower_step_dbm", "raw_noise_upper_step_dbm", "raw_noise_diff_dbm", "raw_noise_sum_dbm")


def find_run(session: Session, ident: str) -> Run:
    """A run by its GUID or a unique GUID prefix (at least 4 characters)."""
    ident = ident.strip().lower()
    if len(ident) < 4:
        raise InputError(f"run '{ident}': give the run GUID or at least its first 4 characters")
    runs = session.scalars(select(Run).where(Run.guid.like(ident.replace("%", "").replace("_", "") + "%"))).all()
    if not runs:
        raise InputError(f"run '{ident}': no run with that GUID in this database (see `tonebench runs`)")
    if len(runs) > 1:
        raise InputError(f"run '{ident}': {len(runs)} runs start with that; give more of the GUID")
    return runs[0]


# What re-referring a point needs: its source settings, leveling and raw readings.
_REFERRAL_INPUTS = (
    "source1_dbm", "source2_dbm", "source1_correction_db", "source2_correction_db", "pin1_dbm", "pin2_dbm",
    *(raw for raw, _ in OUTPUT_COLUMNS.values()),
)


def _measured_points(session: Session, run_id: int) -> list[Point]:
    return session.scalars(
        select(Point)
        .where(Point.run_id == run_id, Point.status == "measured")
        .order_by(Point.center_hz, Point.spacing_hz, Point.bias_v, Point.tone_dbm)
    ).all()


def rereferred(point: Point, tables: dict[str, LossTable]) -> dict[str, float | None]:
    """The point's DUT-referred values with another set's path losses, from its raw readings."""
    offsets = point_offsets(tables, point.f1_hz, point.f2_hz, second_order=point.raw_diff_dbm is not None)
    return referred_values({name: getattr(point, name) for name in _REFERRAL_INPUTS}, offsets)


def _sweeps(session: Session, run_id: int, tables: dict[str, LossTable] | None = None):
    """Per sweep, the arrays the fit takes: as stored, or re-referred to `tables` when given."""
    points = _measured_points(session, run_id)
    for (center_hz, spacing_hz, bias_v), group in groupby(points, key=lambda p: (p.center_hz, p.spacing_hz, p.bias_v)):
        rows = list(group)
        values = [rereferred(row, tables) if tables is not None else None for row in rows]

        def column(name: str, rows=rows, values=values):
            if tables is not None and name in values[0]:
                return [v[name] for v in values]
            return [getattr(row, name) for row in rows]

        arrays = {name: _nan_array(column(name)) for name in POINT_ARRAYS if name != "overload"}
        arrays["overload"] = np.array([bool(v) for v in column("overload")], dtype=bool)
        yield center_hz, spacing_hz, bias_v, rows, arrays


def _nan_array(values) -> np.ndarray:
    return np.array([np.nan if v is None else float(v) for v in values], dtype=float)


def sweep_data(rows: list[Point], arrays: dict[str, np.ndarray]) -> SweepData:
    """The analysis input of one sweep: its (possibly re-referred) arrays plus the raw readings."""
    raw = {name: _nan_array(getattr(row, name) for row in rows) for name in RAW_ARRAYS}
    extra = {name: _nan_array((row.extra_json or {}).get(name) for row in rows) for name in EXTRA_ARRAYS}
    # A second-order product's noise floor has the same output loss as the product.
    noise = {side: extra[f"raw_noise_{side}_dbm"] + arrays[f"im2_{side}_dbm"]
             - _nan_array(getattr(row, f"raw_{side}_dbm") for row in rows) for side in ("diff", "sum")}
    return SweepData(**arrays, **raw, raw_noise_lower_step_dbm=extra["raw_noise_lower_step_dbm"],
                     raw_noise_upper_step_dbm=extra["raw_noise_upper_step_dbm"],
                     noise_diff_dbm=noise["diff"], noise_sum_dbm=noise["sum"])


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
        return {}, f"calibration set {cal.name} has no system residual at {spacing_hz:.6g} Hz spacing"
    row = min(same, key=lambda r: abs(r.center_hz - center_hz))
    extra = row.sweep_json or {}
    shares = check_shares(row.system_ip3_dbm, row.source_ip3_dbm, row.analyzer_ip3_dbm, row.atten_db,
                          extra.get("source_ip3_min_dbm"), extra.get("analyzer_ip3_min_dbm"),
                          split_known=row.source_ip3_dbm is not None or row.analyzer_ip3_dbm is not None
                          or "source_ip3_min_dbm" in extra)
    if shares is None:
        return {}, f"calibration set {cal.name}: the residual at {row.center_hz:.6g} Hz was below its noise"
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
        max_mixer_dbm=figures.get("max_mixer_dbm"),
        system_note=note,
        **shares,
    )


def _assessed(session: Session, run: Run, set_id: int | None, tables: dict | None):
    """(center, spacing, bias, rows, arrays, assessment) for each sweep of the run."""
    cal = session.get(CalibrationSet, set_id) if set_id is not None else None
    for center_hz, spacing_hz, bias_v, rows, arrays in _sweeps(session, run.id, tables):
        assessment = assess_sweep(sweep_data(rows, arrays), analysis_settings(run, cal, center_hz, spacing_hz))
        yield center_hz, spacing_hz, bias_v, rows, arrays, assessment


def _referral_tables(session: Session, run: Run, cal_name: str | None) -> tuple[int | None, dict | None]:
    """(calibration set id, tables to re-refer with or None to use the points as stored)."""
    if cal_name is None:
        return run.calibration_set_id, None
    view = load_set(session, cal_name)
    pairs = sorted({(p.f1_hz, p.f2_hz) for p in _measured_points(session, run.id)})
    check_coverage(view.tables, pairs, f"run {run.guid[:8]}: {view.label}")
    if view.id == run.calibration_set_id:
        return view.id, None
    return view.id, view.tables


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


def analyze_run(sessions: sessionmaker, run_guid: str, cal_name: str | None = None) -> list[Result]:
    """Fit every sweep of a run, flag its points and results, and replace what was stored.

    cal_name re-refers the stored raw readings to that calibration set first (no measuring);
    the results record the set they were referred with, and its system residual is the one the
    source-intermod check uses. The points themselves stay as measured; their flags are replaced.
    """
    with sessions.begin() as session:
        run = find_run(session, run_guid)
        set_id, tables = _referral_tables(session, run, cal_name)
        point_ids = select(Point.id).where(Point.run_id == run.id)
        result_ids = select(Result.id).where(Result.run_id == run.id)
        session.execute(delete(PointFlag).where(PointFlag.point_id.in_(point_ids)))
        session.execute(delete(ResultFlag).where(ResultFlag.result_id.in_(result_ids)))
        session.execute(delete(Result).where(Result.run_id == run.id))
        results = []
        for center_hz, spacing_hz, bias_v, rows, _arrays, a in _assessed(session, run, set_id, tables):
            fit, second = a.fit, a.second_order
            for row, flags in zip(rows, a.point_flags):
                session.add_all(_flag_row(PointFlag, f, point_id=row.id) for f in flags)
            result = Result(
                run_id=run.id,
                center_hz=center_hz,
                spacing_hz=spacing_hz,
                bias_v=bias_v,
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


def _fmt(value, spec: str = "+.2f") -> str:
    return "-" if value is None else format(value, spec)


def flag_names(flags) -> str:
    """Flag labels of a result, each once, e.g. 'analyzer-limited (noise), slope'."""
    names: list[str] = []
    for f in flags:
        label = f.flag if f.cause is None else f"{f.flag} ({f.cause})"
        if label not in names:
            names.append(label)
    return ", ".join(names)


def terminal_row(result: Result) -> dict[str, str]:
    """A compact row for a terminal table (the HTML report has the full one); dB and dBm."""
    return {
        "GHz": f"{result.center_hz / 1e9:.4f}",
        "Spacing": f"{result.spacing_hz / 1e6:.3g} MHz",
        "Gain": _fmt(result.gain_db, ".2f"),
        # Lower and upper intercepts are in the report; the bound is what a reader must see here.
        "IIP3": _fmt(result.iip3_dbm) + ("" if result.iip3_bound_db is None else f" ±{result.iip3_bound_db:.2f}"),
        "OIP3": _fmt(result.oip3_dbm),
        "Slope": _fmt(None if result.slope_im3_lower is None else (result.slope_im3_lower + result.slope_im3_upper) / 2, ".2f"),
        "P1dB": _fmt(result.p1db_in_dbm),
        "Valid": f"{result.n_valid}/{result.n_points}",
        "Flags": flag_names(result.flags) or "-",
        "Note": result.reason or "",
    }


def write_run_report(sessions: sessionmaker, run_guid: str, path: Path) -> Path:
    """Write the run's self-contained HTML report, fitted from its stored points."""
    with sessions() as session:
        run = find_run(session, run_guid)
        # The report shows what the stored results were fitted from: re-referred if they were.
        result_sets = {r.calibration_set_id for r in run.results}
        tables = None
        referred_to = None
        if len(result_sets) == 1 and None not in result_sets and result_sets != {run.calibration_set_id}:
            referred_to = load_set_by_id(session, result_sets.pop())
            tables = referred_to.tables
        sweeps, rows = [], []
        set_id = referred_to.id if referred_to is not None else run.calibration_set_id
        for center_hz, spacing_hz, _bias_v, _points, arrays, assessment in _assessed(session, run, set_id, tables):
            fit = assessment.fit
            sweeps.append(
                SweepPlotData(
                    title=sweep_title(center_hz, spacing_hz),
                    pin_dbm=(arrays["pin1_dbm"] + arrays["pin2_dbm"]) / 2.0,
                    pout_dbm=(arrays["pout_f1_dbm"] + arrays["pout_f2_dbm"]) / 2.0,
                    im3_lower_dbm=arrays["im3_lower_dbm"],
                    im3_upper_dbm=arrays["im3_upper_dbm"],
                    noise_dbm=(arrays["noise_lower_dbm"] + arrays["noise_upper_dbm"]) / 2.0,
                    valid_mask=fit.valid_mask,
                    result=fit,
                    assessment=assessment,
                )
            )
            rows.append(report_result_row(center_hz, spacing_hz, fit, assessment))
        device = run.device
        summary = [
            {"label": "Run", "value": run.guid},
            {"label": "Device", "value": f"{device.part_number} serial {device.serial}" + (f", lot {device.lot}" if device.lot else "")},
            {"label": "Bench", "value": run.bench.name + (" (simulated)" if run.simulated else "")},
            {"label": "Started (UTC)", "value": run.started_at.strftime("%Y-%m-%d %H:%M:%S")},
            {"label": "Status", "value": run.status + (f": {run.end_reason}" if run.end_reason else "")},
        ]
        if run.calibration_set is not None:
            summary.append({"label": "Calibration", "value": f"{run.calibration_set.name} ({run.calibration_set.method})"})
        if referred_to is not None:
            summary.append({"label": "Re-referred to", "value": f"{referred_to.name} ({referred_to.method})"})
        return write_report(path, f"Two-tone intercepts, {run.plan.name}", summary, sweeps, rows)
