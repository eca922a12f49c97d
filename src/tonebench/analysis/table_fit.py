"""`tonebench.analysis.fit`: the assessment the CLI stores, from any table of one sweep's readings
(a pandas DataFrame, a dict of arrays: anything indexed by column name), so that data from
another bench is judged the same way. No pandas import: columns are read through numpy."""

from __future__ import annotations

from dataclasses import fields

import numpy as np

from tonebench.analysis.assess import SweepAssessment, SweepData, assess_sweep
from tonebench.analysis.settings import AnalysisSettings
from tonebench.errors import InputError

# One row per drive level; powers in dBm per tone, inputs at the DUT input plane, outputs at its
# output plane (the columns RunView.points() gives). The rest of SweepData's fields (overload,
# atten_db, raw_* analyzer readings, im2_*) are used when present.
REQUIRED_COLUMNS = ("pin1_dbm", "pin2_dbm", "pout_f1_dbm", "pout_f2_dbm", "im3_lower_dbm", "im3_upper_dbm",
                    "noise_lower_dbm", "noise_upper_dbm")
OPTIONAL_COLUMNS = tuple(f.name for f in fields(SweepData) if f.name not in REQUIRED_COLUMNS)
# Columns that tell sweeps apart in a table of a whole run.
_SWEEP_COLUMNS = ("temperature_c", "lo_dbm", "center_hz", "spacing_hz", "bias_v")


def fit(table, settings: AnalysisSettings | None = None) -> SweepAssessment:
    """Assess one sweep: valid region, fits, intercepts (.fit.iip3_dbm, .fit.oip3_dbm, lower and
    upper), flags with reasons, the IIP3 bound (.iip3_bound_db). `settings` says what is known of
    the test system (analyzer TOI, residual); by default nothing. Rows are taken in rising drive
    (tone_dbm, else the mean input power); failed points (a `status` column other than
    'measured') are left out."""
    columns = set(table.keys())
    missing = [name for name in REQUIRED_COLUMNS if name not in columns]
    if missing:
        raise InputError(f"fit: the table has no column {', '.join(missing)}; needed: {', '.join(REQUIRED_COLUMNS)} "
                         "(dBm; inputs at the DUT input plane, outputs at its output plane)")
    keep = np.ones(len(np.asarray(table[REQUIRED_COLUMNS[0]])), dtype=bool)
    if "status" in columns:
        keep &= np.asarray(table["status"]) == "measured"
    for name in _SWEEP_COLUMNS:
        if name in columns:
            values = {float(v) for v in _floats(table[name])[keep] if np.isfinite(v)}
            if len(values) > 1:
                raise InputError(f"fit: the table holds {len(values)} values of {name}; fit one sweep at a time "
                                 f"(e.g. df[df.{name} == {min(values):g}])")
    arrays = {name: _floats(table[name])[keep] for name in (*REQUIRED_COLUMNS, *OPTIONAL_COLUMNS)
              if name in columns and name != "overload"}
    if "tone_dbm" not in arrays:
        arrays["tone_dbm"] = (arrays["pin1_dbm"] + arrays["pin2_dbm"]) / 2.0
    order = np.argsort(arrays["tone_dbm"], kind="stable")
    arrays = {name: values[order] for name, values in arrays.items()}
    overload = np.asarray(table["overload"], dtype=bool)[keep][order] if "overload" in columns else np.zeros(order.size, bool)
    return assess_sweep(SweepData(**arrays, overload=overload), settings or AnalysisSettings())


def _floats(values) -> np.ndarray:
    return np.array([np.nan if v is None else float(v) for v in np.asarray(values, dtype=object)], dtype=float)
