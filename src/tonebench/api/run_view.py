"""One stored run as a notebook sees it: its points and results as DataFrames, its sweep figures."""

from __future__ import annotations

import json

import pandas as pd
import plotly.graph_objects as go

from tonebench.errors import InputError
from tonebench.plan.axes import GROUP_FIELDS, point_name_of_key
from tonebench.report.run_page import sweep_plot
from tonebench.report.run_report import flag_label, sweep_figure
from tonebench.report.stored_sweeps import report_sweeps_with_points
from tonebench.store.lookups import find_run
from tonebench.store.models import Point
from tonebench.store.point_record import RECORD_FIELDS, record_of

# Result columns, in the order a reader compares them (units in the names).
RESULT_COLUMNS = (
    "temperature_c", "lo_dbm", "center_hz", "spacing_hz", "bias_v", "n_points", "n_valid", "gain_db", "iip3_dbm",
    "iip3_bound_db", "iip3_lower_dbm", "iip3_upper_dbm", "oip3_dbm", "oip3_lower_dbm", "oip3_upper_dbm",
    "slope_fundamental", "slope_im3_lower", "slope_im3_upper", "p1db_in_dbm", "p1db_out_dbm", "iip2_dbm",
    "oip2_dbm", "slope_im2", "valid_tone_min_dbm", "valid_tone_max_dbm", "verdict", "verdict_detail", "reason",
)
POINT_COLUMNS = ("run_guid", "point", *RECORD_FIELDS, "in_fit", "left_out", "flags", "flag_details")


class RunView:
    """A stored run, read-only. `guid`, `status`, `part_number`, `serial`, `lot` and `started_at`
    describe it; points(), results() and figure() read its rows each time they are called."""

    def __init__(self, database, run) -> None:
        self._database = database
        self.guid: str = run.guid
        self.status: str = run.status
        self.started_at = run.started_at
        self.part_number = run.device.part_number if run.device else None
        self.serial = run.device.serial if run.device else None
        self.lot = run.device.lot if run.device else None
        self.plan_name: str = run.plan.name

    def __repr__(self) -> str:
        return f"<tonebench run {self.guid[:8]} {self.status}: {self.part_number} {self.serial}, plan {self.plan_name}>"

    def points(self) -> pd.DataFrame:
        """One row per point, measured or failed, in measuring order: every stored column (DUT-
        referred *_dbm, raw_* as read at the analyzer, its settings span_hz, rbw_hz, vbw_hz,
        atten_db, bias and chamber readings; extra_json as JSON text), `point` (its readable
        name), and from the stored
        analysis `in_fit` (in the fitted region), `left_out` (why not, or None), `flags` (list of
        'flag (cause)') and `flag_details` (each with its reason). Failed points have in_fit None."""
        rows = []
        with self._database.session() as session:
            run = find_run(session, self.guid)
            for group, stored, arrays, assessment in report_sweeps_with_points(session, run,
                                                                                  run.calibration_set_id, None):
                reasons = sweep_plot(group, arrays, assessment).left_out_reasons()
                for index, point in enumerate(stored):
                    flags = assessment.point_flags[index]
                    rows.append(self._point_row(point.record, in_fit=bool(assessment.fit.valid_mask[index]),
                                                left_out=reasons[index], flags=flags))
            failed = session.query(Point).filter(Point.run_id == run.id, Point.status != "measured").all()
            rows += [self._point_row(record_of(point), in_fit=None, left_out=None, flags=[]) for point in failed]
        frame = pd.DataFrame(rows, columns=list(POINT_COLUMNS))
        return frame.sort_values("seq", kind="stable").reset_index(drop=True)

    def _point_row(self, record, in_fit, left_out, flags) -> dict:
        values = {**vars(record), "extra_json": None if record.extra_json is None else json.dumps(record.extra_json)}
        return {"run_guid": self.guid, "point": point_name_of_key(record.point_key), **values,
                "in_fit": in_fit, "left_out": left_out, "flags": [flag_label(f) for f in flags],
                "flag_details": "; ".join(f"{flag_label(f)}: {f.detail}" for f in flags) or None}

    def results(self) -> pd.DataFrame:
        """One row per sweep as stored by the last analysis: intercepts (dBm) with the IIP3 bound
        (dB), slopes, P1dB, IIP2, the valid tone range, verdict and `flags` ('flag (cause)')."""
        with self._database.session() as session:
            run = find_run(session, self.guid)
            rows = [{"run_guid": run.guid, **{name: getattr(r, name) for name in RESULT_COLUMNS},
                     "flags": sorted({flag_label(f) for f in r.flags})} for r in run.results]
        frame = pd.DataFrame(rows, columns=["run_guid", *RESULT_COLUMNS, "flags"])
        order = [name for name in ("temperature_c", "lo_dbm", "center_hz", "spacing_hz", "bias_v")]
        return frame.sort_values(order, na_position="first", kind="stable").reset_index(drop=True)

    def analysis_settings(self, center_hz: float, spacing_hz: float):
        """What the stored analysis knew of this run's test system for one sweep (the analyzer's
        figures, the calibration set's residual): pass it to tonebench.analysis.fit to refit a
        sweep exactly as `tonebench analyze` does."""
        from tonebench.results.sweeps import analysis_settings
        from tonebench.store.models import CalibrationSet

        with self._database.session() as session:
            run = find_run(session, self.guid)
            cal = session.get(CalibrationSet, run.calibration_set_id) if run.calibration_set_id is not None else None
            return analysis_settings(run, cal, center_hz, spacing_hz)

    def figure(self, center_hz: float | None = None, spacing_hz: float | None = None, bias_v: float | None = None,
               temperature_c: float | None = None, lo_dbm: float | None = None) -> go.Figure:
        """The report's figure of one sweep (powers against drive, fits, intercepts). Name the
        sweep by its conditions; one left out may be omitted when the run has only one value."""
        wanted = {"center_hz": center_hz, "spacing_hz": spacing_hz, "bias_v": bias_v, "temperature_c": temperature_c,
                  "lo_dbm": lo_dbm}
        with self._database.session() as session:
            run = find_run(session, self.guid)
            sweeps = [(group, arrays, assessment) for group, _stored, arrays, assessment
                      in report_sweeps_with_points(session, run, run.calibration_set_id, None)]
        chosen = [s for s in sweeps if all(value is None or _same(s[0][name], value) for name, value in wanted.items())]
        if len(chosen) != 1:
            options = "; ".join(", ".join(f"{k}={g[k]:g}" for k in GROUP_FIELDS if g[k] is not None) for g, _, _ in sweeps)
            raise InputError(f"run {self.guid[:8]}: {len(chosen)} sweeps match {_describe(wanted)}; "
                             f"the run has: {options}")
        return sweep_figure(sweep_plot(*chosen[0]))


def _same(stored: float | None, wanted: float) -> bool:
    return stored is not None and abs(stored - wanted) <= 1e-9 * max(1.0, abs(wanted))


def _describe(wanted: dict) -> str:
    given = [f"{name}={value:g}" for name, value in wanted.items() if value is not None]
    return ", ".join(given) or "no condition"
