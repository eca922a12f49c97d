"""Analysis: pure functions over numpy arrays (no database, no instruments).

intercepts: per-point gain and third-order intercepts; fit: one sweep's valid region and fits;
compression: the 1 dB compression point.
"""

from tonebench.analysis.compression import p1db
from tonebench.analysis.fit import SweepResult, fit_sweep, noise_corrected_dbm
from tonebench.analysis.intercepts import PointIntercepts, point_intercepts

__all__ = [
    "PointIntercepts",
    "SweepResult",
    "fit_sweep",
    "noise_corrected_dbm",
    "p1db",
    "point_intercepts",
]
