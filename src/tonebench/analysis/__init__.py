"""Analysis: pure functions over numpy arrays (no database, no instruments); imports only numpy,
scipy and tonebench.errors/units.

intercepts: the per-point gain and third-order intercepts (the one formula); sweep_fit: one sweep's valid
region and fits; compression: the 1 dB compression point; phasor: coherent-sum error bounds;
attenuation: the analyzer's own IM3 and noise versus attenuation, and the optimum; flags: the flag
vocabulary and the attenuation-step judgement; uncertainty: combining bound terms; second_order:
IIP2; settings: what the analysis knows of the test system. assess runs one sweep from readings to
flags, fits and bound through named steps: point_checks (noise, overload, tone imbalance),
system_checks (the analyzer's own distortion, the sources' intermod), region (the fit over the
valid region, compression), bound (the IIP3 bound and lower bound), result_flags. table_fit:
`fit(table)`, the same assessment from any table of columns (a pandas DataFrame included).
"""

from tonebench.analysis.assess import (
    AnalysisSettings,
    SweepAssessment,
    SweepData,
    assess_sweep,
)
from tonebench.analysis.attenuation import (
    AttenChoice,
    analyzer_im3_dbm,
    optimum_atten_db,
)
from tonebench.analysis.compression import p1db
from tonebench.analysis.sweep_fit import SweepResult, fit_sweep, noise_corrected_dbm
from tonebench.analysis.flags import Flag, judge_step
from tonebench.analysis.intercepts import PointIntercepts, input_intercepts_dbm, point_intercepts
from tonebench.analysis.phasor import (
    intercept_error_db,
    phasor_bounds_db,
    reading_error_bounds_db,
)
from tonebench.analysis.table_fit import REQUIRED_COLUMNS, fit
from tonebench.analysis.second_order import (
    SecondOrderResult,
    fit_second_order,
    point_iip2_dbm,
)

__all__ = [
    "REQUIRED_COLUMNS",
    "AnalysisSettings",
    "AttenChoice",
    "Flag",
    "PointIntercepts",
    "SecondOrderResult",
    "SweepAssessment",
    "SweepData",
    "SweepResult",
    "analyzer_im3_dbm",
    "assess_sweep",
    "fit",
    "fit_second_order",
    "fit_sweep",
    "input_intercepts_dbm",
    "intercept_error_db",
    "judge_step",
    "noise_corrected_dbm",
    "optimum_atten_db",
    "p1db",
    "phasor_bounds_db",
    "point_iip2_dbm",
    "point_intercepts",
    "reading_error_bounds_db",
]
