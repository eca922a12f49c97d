"""How far the sweet spot moves with temperature: a straight line through the sweet spots found
at each temperature, weighted by their bounds.

Method: weighted least squares (numpy.polyfit, weights 1/bound, covariance unscaled), so the
slope's bound comes from the sweet spots' own bounds, not from the scatter of two or three
points about the line (which says nothing with two points). Each bound is taken as one standard
deviation. Over a span of tens of kelvin the threshold voltage moves linearly to the first order
(common practice; the simulated FET's truth bends by a few per cent over 100 K).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np



@dataclass(frozen=True)
class SweetSpotDrift:
    mv_per_k: float
    bound_mv_per_k: float  # one standard deviation, from the sweet spots' bounds
    temperatures_c: tuple[float, ...]
    method: str


def sweet_spot_drift(temperatures_c, sweet_spots_v, bounds_v) -> SweetSpotDrift | None:
    """The drift (mV/K) from two or more (temperature, sweet spot, bound); None with fewer."""
    temps = np.asarray(temperatures_c, dtype=float)
    spots = np.asarray(sweet_spots_v, dtype=float)
    # A zero bound would weigh one point infinitely: floor each at a microvolt.
    bounds = np.maximum(np.asarray(bounds_v, dtype=float), 1e-6)
    if temps.size < 2 or np.ptp(temps) == 0.0:
        return None
    (slope_v_per_k, _), cov = np.polyfit(temps, spots, 1, w=1.0 / bounds, cov="unscaled")
    return SweetSpotDrift(1e3 * float(slope_v_per_k), 1e3 * math.sqrt(float(cov[0, 0])), tuple(float(t) for t in temps),
                          f"weighted straight line through {temps.size} sweet spots (numpy.polyfit, weights 1/bound)")
