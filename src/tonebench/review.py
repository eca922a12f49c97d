"""From stored points to stored results and a report: the glue between store and analysis."""

from __future__ import annotations

import math
from itertools import groupby
from pathlib import Path

import numpy as np
from sqlalchemy import delete, select
from sqlalchemy.orm import Session, sessionmaker

from tonebench.analysis.fit import fit_sweep
from tonebench.calibration.referral import OUTPUT_COLUMNS, check_coverage, point_offsets, referred_values
from tonebench.calibration.sets import load_set, load_set_by_id
from tonebench.errors import InputError
from tonebench.offsets import LossTable
from tonebench.report import SweepPlotData, sweep_title, write_report
from tonebench.report import result_row as report_result_row
from tonebench.store.models import Point, Result, Run, utc_now

POINT_ARRAYS = (
    "tone_dbm", "pin1_dbm", "pin2_dbm", "pout_f1_dbm", "pout_f2_dbm", "im3_lower_dbm",
    "im3_upper_dbm", "noise_lower_dbm", "noise_upper_dbm", "overload",
)


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

        arrays = {name: np.array(column(name), dtype=float) for name in POINT_ARRAYS}
        arrays["overload"] = arrays["overload"].astype(bool)
        yield center_hz, spacing_hz, bias_v, arrays


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


def analyze_run(sessions: sessionmaker, run_guid: str, cal_name: str | None = None) -> list[Result]:
    """Fit every sweep of a run and replace its stored results.

    cal_name re-refers the stored raw readings to that calibration set first (no measuring);
    the results record the set they were referred with. The points themselves stay as measured.
    """
    with sessions.begin() as session:
        run = find_run(session, run_guid)
        set_id, tables = _referral_tables(session, run, cal_name)
        session.execute(delete(Result).where(Result.run_id == run.id))
        results = []
        for center_hz, spacing_hz, bias_v, arrays in _sweeps(session, run.id, tables):
            fit = fit_sweep(**arrays)
            results.append(
                Result(
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
                    valid_tone_min_dbm=_finite_or_none(fit.valid_tone_min_dbm),
                    valid_tone_max_dbm=_finite_or_none(fit.valid_tone_max_dbm),
                    reason=fit.reason,
                    details_json={"valid_mask": [bool(v) for v in fit.valid_mask]},
                    calibration_set_id=set_id,
                    created_at=utc_now(),
                )
            )
        session.add_all(results)
    return results


def _fmt(value, spec: str = "+.2f") -> str:
    return "-" if value is None else format(value, spec)


def terminal_row(result: Result) -> dict[str, str]:
    """A compact row for a terminal table (the HTML report has the full one); dB and dBm."""
    return {
        "GHz": f"{result.center_hz / 1e9:.4f}",
        "Spacing": f"{result.spacing_hz / 1e6:.3g} MHz",
        "Gain": _fmt(result.gain_db, ".2f"),
        "IIP3": _fmt(result.iip3_dbm),
        "IIP3 lo/up": f"{_fmt(result.iip3_lower_dbm)}/{_fmt(result.iip3_upper_dbm)}",
        "OIP3": _fmt(result.oip3_dbm),
        "IM3 slope": _fmt(None if result.slope_im3_lower is None else (result.slope_im3_lower + result.slope_im3_upper) / 2, ".2f"),
        "P1dB/tone": _fmt(result.p1db_in_dbm),
        "Valid": f"{result.n_valid}/{result.n_points}",
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
        for center_hz, spacing_hz, _bias_v, arrays in _sweeps(session, run.id, tables):
            fit = fit_sweep(**arrays)
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
                )
            )
            rows.append(report_result_row(center_hz, spacing_hz, fit))
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
