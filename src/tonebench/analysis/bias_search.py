"""The linearity sweet spot in gate bias: predicted from a DC transfer sweep, and measured from
two-tone points at one stated drive level.

Measured. At one drive P (dBm per tone at the DUT input) each point gives the IM3-to-tone power
ratio r = P_IM3 / P_tone at the output, and its per-point IIP3 = P - 10 log10(r) / 2. Near the
g3 zero the IM3 amplitude is |s (V - V0)| (g3 is linear in V there; the fifth-order term only
moves the zero, which is why the sweet spot depends on drive), so in power
    r(V) = s^2 (V - V0)^2 + c
with c what fills the null (noise, residual distortion of the test system, higher orders). The
fit is least squares on 10 log10 r (readings scatter in dB, not in watts), by
scipy.optimize.curve_fit; the bounds are 1-sigma from its covariance, propagated to the window
edges through a numerical Jacobian. IIP3 >= T holds where r <= 10^(-2 (T - P) / 10). The peak
reported is the highest IIP3 measured: how deep the fitted null goes beyond the points is an
extrapolation (and with no floor in reach, c drops out of the fit).

Predicted. g1..g3 from analysis/transconductance.py; the sweet spot is the g3 zero, the window
where the predicted IIP3 (g3 floored at its noise) stays above the threshold.

Input offset. The DC prediction is referred to the gate; the two-tone measurement to the DUT
input. An input match of voltage gain k makes the measured IIP3 lower by 20 log10 k. It is fitted
as the median of (predicted - measured) at bias points well away from the null (measured IIP3 at
least 10 dB below its peak: there the third-order term dominates at the stated drive).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.optimize import OptimizeWarning, curve_fit

from tonebench.analysis.transconductance import (
    TransconductanceResult,
    capped_iip3_dbm,
    iip3_window,
    sweet_spots,
    transconductance,
)
from tonebench.errors import InputError

OFFSET_AWAY_FROM_PEAK_DB = 10.0
NOISE_MARGIN_DB = 3.0  # the analysis's "only a bound" margin over the noise floor
NO_FLOOR_LOG = math.log(1e-30)  # c of a fit without a floor: 300 dB below any reading


@dataclass(frozen=True)
class SweetSpotFinding:
    """A sweet spot with its bound, peak IIP3 and window (V, dBm); None where there is none."""

    kind: str  # "dc-prediction" or "two-tone"
    sweet_spot_v: float
    sweet_spot_bound_v: float
    peak_iip3_dbm: float
    window_threshold_dbm: float | None
    window_low_v: float | None
    window_high_v: float | None
    window_bound_v: float | None
    method: str
    drive_tone_dbm: float | None = None
    drain_current_a: float | None = None
    gain_db: float | None = None

    @property
    def window_width_v(self) -> float | None:
        if self.window_low_v is None or self.window_high_v is None:
            return None
        return self.window_high_v - self.window_low_v


def window_threshold_dbm(peak_dbm: float, threshold_dbm: float | None, below_peak_db: float | None) -> float:
    if (threshold_dbm is None) == (below_peak_db is None):
        raise InputError("give exactly one of a window threshold (dBm) and a distance below the peak (dB)")
    return threshold_dbm if threshold_dbm is not None else peak_dbm - below_peak_db


# --- predicted from DC ------------------------------------------------------------------------


def predicted_sweet_spot(gate_v, drain_a, sigma_a: float, window_points: int, polyorder: int,
                         threshold_dbm: float | None = None, below_peak_db: float | None = None,
                         ) -> tuple[TransconductanceResult, SweetSpotFinding | None]:
    """g1..g3 of a DC sweep and the sweet spot they predict (the g3 zero from + to -, expansion to
    compression); None when g3 never crosses."""
    result = transconductance(gate_v, drain_a, sigma_a, window_points=window_points, polyorder=polyorder)
    spots = [spot for spot in (sweet_spots(result) or []) if spot.slope_g3_per_v < 0.0]
    if not spots:
        return result, None
    # Reading noise can make g3 cross zero more than once near the true zero; g3 = 0 is the peak
    # of g2 (g3 is proportional to dg2/dV), which is far less noisy: the crossing nearest it is taken.
    g2_peak_v = float(result.gate_v[int(np.argmax(result.g2))])
    spot = min(spots, key=lambda s: abs(s.gate_v - g2_peak_v))
    iip3 = capped_iip3_dbm(result)
    peak_dbm = float(np.max(iip3[np.abs(result.gate_v - spot.gate_v) <= 2 * result.step_v]))
    threshold = window_threshold_dbm(peak_dbm, threshold_dbm, below_peak_db)
    window = iip3_window(result, spot.gate_v, threshold_dbm=threshold)
    method = (f"Savitzky-Golay derivatives, {window_points}-point window, order {polyorder}, "
              f"{result.step_v * 1e3:.3g} mV step; IIP3 = (2/3)|g1/g3|/50 ohm with |g3| floored at its noise")
    drain_at_a = float(np.interp(spot.gate_v, np.asarray(gate_v, dtype=float), np.asarray(drain_a, dtype=float)))
    return result, SweetSpotFinding(
        kind="dc-prediction", sweet_spot_v=spot.gate_v, sweet_spot_bound_v=spot.sigma_v, peak_iip3_dbm=peak_dbm,
        window_threshold_dbm=threshold, window_low_v=None if window is None else window.low_v,
        window_high_v=None if window is None else window.high_v,
        # An edge moves with g3 as the zero does (g3 is near linear across the window): the same bound.
        window_bound_v=max(spot.sigma_v, result.step_v), method=method, drain_current_a=drain_at_a)


# --- measured from two-tone points ------------------------------------------------------------


@dataclass(frozen=True)
class DrivePoints:
    """Two-tone points at one drive level, one per gate voltage (sorted by gate voltage)."""

    drive_tone_dbm: float
    gate_v: np.ndarray
    ratio_db: np.ndarray  # IM3 (power mean of lower and upper) less the tone, at the output
    gain_db: np.ndarray
    drain_current_a: np.ndarray
    at_floor: np.ndarray  # both IM3 reads within NOISE_MARGIN_DB of the noise: the IIP3 is at least that

    @property
    def iip3_dbm(self) -> np.ndarray:
        return self.drive_tone_dbm - self.ratio_db / 2.0


def drive_points(rows, drive_tone_dbm: float) -> DrivePoints:
    """From stored point rows (measured, any runs): those at the drive level, by gate voltage."""
    chosen = sorted((r for r in rows if r.status == "measured" and r.bias_v is not None
                     and abs(r.tone_dbm - drive_tone_dbm) < 1e-6), key=lambda r: r.bias_v)
    if not chosen:
        raise InputError(f"no measured point at the drive level {drive_tone_dbm:g} dBm")
    pin = np.array([0.5 * (r.pin1_dbm + r.pin2_dbm) for r in chosen])
    pout = np.array([0.5 * (r.pout_f1_dbm + r.pout_f2_dbm) for r in chosen])
    im3 = np.array([10 * math.log10(0.5 * (10 ** (r.im3_lower_dbm / 10) + 10 ** (r.im3_upper_dbm / 10))) for r in chosen])
    drain = np.array([np.nan if r.drain_current_a is None else r.drain_current_a for r in chosen])
    at_floor = np.array([max(r.im3_lower_dbm - r.noise_lower_dbm, r.im3_upper_dbm - r.noise_upper_dbm)
                         < NOISE_MARGIN_DB for r in chosen])
    return DrivePoints(drive_tone_dbm, np.array([r.bias_v for r in chosen]), im3 - pout, pout - pin, drain, at_floor)


def null_estimate_v(points: DrivePoints) -> float:
    """Where the measured points put the g3 zero. The IM3 amplitude ratio a = 10^(ratio/20) is
    |g3/g1| A^2 at a fixed drive: magnitude only, so a null narrower than the steps need not show
    as a dip (and strong inversion, where a keeps falling, would win a plain smallest-ratio pick).
    The sign is restored instead: for each split between neighbouring gate voltages, a is taken
    positive below and negative above, and a cubic is fitted to it weighted by 1/a (relative
    residuals: a spans decades). The split whose cubic fits best and has its root between the two
    neighbours gives the null (the root); with no such split, the smallest ratio measured.
    With fewer than six points the cubic cannot judge a split: the smallest ratio measured."""
    v, ratio_db = points.gate_v, points.ratio_db
    fallback_v = float(v[int(np.argmin(ratio_db))])
    if v.size < 6:
        return fallback_v
    amplitude = 10 ** (ratio_db / 20)
    centre_v, scale_v = float(np.mean(v)), float(np.ptp(v)) or 1.0
    x = (v - centre_v) / scale_v
    best = None
    for split in range(1, v.size):
        signed = np.where(np.arange(v.size) < split, amplitude, -amplitude)
        coeffs, residual, *_ = np.polyfit(x, signed, 3, w=1.0 / amplitude, full=True)
        roots = [r.real for r in np.roots(coeffs) if abs(r.imag) < 1e-9 and x[split - 1] <= r.real <= x[split]]
        if roots and (best is None or float(residual.sum()) < best[0]):
            best = (float(residual.sum()), roots[0])
    return fallback_v if best is None else centre_v + scale_v * best[1]


def refined_gates_v(points: DrivePoints, fine_step_v: float, fine_points: int) -> list[float]:
    """Fine gate voltages around the null the measured points put (null_estimate_v), on the fine
    step's grid, not yet measured."""
    centre_v = round(null_estimate_v(points) / fine_step_v) * fine_step_v
    half = fine_points // 2
    wanted = [round(centre_v + k * fine_step_v, 6) for k in range(-half, half + 1)]
    return [v for v in wanted if not np.any(np.isclose(points.gate_v, v, atol=1e-9))]


def _log_ratio(v, log_s2, v0, log_c):
    return 10.0 * np.log10(np.exp(log_s2) * (v - v0) ** 2 + np.exp(log_c))


def measured_sweet_spot(points: DrivePoints, threshold_dbm: float | None = None,
                        below_peak_db: float | None = None, fit_points: int = 9) -> SweetSpotFinding:
    """The sweet spot from the fit_points points nearest the null the points put (see the module
    docstring and null_estimate_v)."""
    order = np.argsort(np.abs(points.gate_v - null_estimate_v(points)))[:fit_points]
    v, ratio_db = points.gate_v[order], points.ratio_db[order]
    if v.size < 4:
        raise InputError(f"the sweet-spot fit needs at least 4 gate voltages at the drive level; got {v.size}")
    v0 = float(v[np.argmin(ratio_db)])
    far = int(np.argmax(np.abs(v - v0)))
    s2 = 10 ** (ratio_db[far] / 10) / max((v[far] - v0) ** 2, 1e-12)
    start = (math.log(s2), v0, math.log(10 ** (ratio_db.min() / 10) / 4))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OptimizeWarning)
        params, cov = curve_fit(_log_ratio, v, ratio_db, p0=start, maxfev=20000)
    if not np.all(np.isfinite(cov)):
        # A null deeper than the points can resolve (c -> 0): fit without c, which then adds nothing.
        two, cov_two = curve_fit(lambda x, log_s2, v0: _log_ratio(x, log_s2, v0, NO_FLOOR_LOG),
                                 v, ratio_db, p0=start[:2], maxfev=20000)
        params = np.array([two[0], two[1], NO_FLOOR_LOG])
        cov = np.zeros((3, 3))
        cov[:2, :2] = cov_two
    # The peak is the highest IIP3 measured (the fitted null's depth extrapolates beyond the points).
    peak_dbm = float(np.max(points.iip3_dbm))
    threshold = window_threshold_dbm(peak_dbm, threshold_dbm, below_peak_db)
    ratio_limit = 10 ** (-2 * (threshold - points.drive_tone_dbm) / 10)

    def edges(p):
        reach = (ratio_limit - math.exp(p[2])) / math.exp(p[0])
        half = math.sqrt(reach) if reach > 0 else math.nan
        return np.array([p[1] - half, p[1] + half])

    low_v, high_v = edges(params)
    steps = (1e-6, 1e-7, 1e-6)  # log s^2, V0 (V), log c
    jac = np.column_stack([(edges(params + h * e) - edges(params - h * e)) / (2 * h) for h, e in zip(steps, np.eye(3))])
    edge_sigma = np.sqrt(np.abs(np.diag(jac @ cov @ jac.T)))
    window = not math.isnan(low_v)
    gate_order = np.argsort(points.gate_v)
    at = lambda values: float(np.interp(params[1], points.gate_v[gate_order], values[gate_order]))
    return SweetSpotFinding(
        kind="two-tone", sweet_spot_v=float(params[1]), sweet_spot_bound_v=float(math.sqrt(cov[1, 1])),
        peak_iip3_dbm=peak_dbm, window_threshold_dbm=threshold,
        window_low_v=float(low_v) if window else None, window_high_v=float(high_v) if window else None,
        window_bound_v=float(np.max(edge_sigma)) if window else None,
        method=(f"fit of 10log10(s^2 (V-V0)^2 + c) to the IM3/tone ratio of {v.size} points at "
                f"{points.drive_tone_dbm:g} dBm per tone (scipy curve_fit, 1-sigma bounds)"),
        drive_tone_dbm=points.drive_tone_dbm, drain_current_a=at(points.drain_current_a), gain_db=at(points.gain_db))


def input_offset_db(points: DrivePoints, result: TransconductanceResult) -> float | None:
    """Predicted (gate plane) less measured (DUT input) IIP3, the median over points well away from
    the null; 20 log10 of the input match's voltage gain. None without such points in the DC range."""
    inside = (points.gate_v >= result.gate_v[0]) & (points.gate_v <= result.gate_v[-1])
    away = inside & (points.iip3_dbm <= np.max(points.iip3_dbm) - OFFSET_AWAY_FROM_PEAK_DB)
    if not np.any(away):
        return None
    predicted = np.interp(points.gate_v[away], result.gate_v, capped_iip3_dbm(result))
    return float(np.median(predicted - points.iip3_dbm[away]))
