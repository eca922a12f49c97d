"""The valid region of one sweep as named steps: the fit over it (its top trimmed where higher-order
terms bias the IM3) and the points whose gain left the small-signal value (compression).

Same conventions as point_checks: plain arrays in, a small frozen result with its point flags out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tonebench.analysis import flags as fl
from tonebench.analysis.flags import Flag
from tonebench.analysis.point_checks import PointFlags, flag_points, mean_pair
from tonebench.analysis.sweep_fit import (
    FIT_INPUTS,
    GAIN_TOLERANCE_DB,
    MIN_VALID_POINTS,
    FitPoints,
    SweepResult,
    fit_sweep,
    fit_with_points,
    mean_of,
)

# Scatter of one point's intercept at high signal-to-noise: the analyzer's reading repeatability
# between a tone and a product (a few hundredths of a dB; a common-practice figure, from memory).
POINT_SCATTER_FLOOR_DB = 0.05
HIGH_ORDER_COVERAGE = 2.0  # a top point is left out when it departs by more than this many sigma


def high_order_top(pin_dbm, point_iip3_dbm, point_sigma_db, valid) -> np.ndarray:
    """Points at the top of the valid region whose IM3 higher-order terms bias (bool, per point).

    With slope 3 every point's intercept is the same; where fifth- and higher-order terms add to
    the IM3 the local slope departs from 3 and the per-point intercepts drift with drive (they
    fall for a compressive device). Working down from the strongest point, a point is left out
    while its intercept departs from the mean of the points below it by more than
    HIGH_ORDER_COVERAGE times their combined scatter (point_sigma_db per point, at least
    POINT_SCATTER_FLOOR_DB). At least half the region, and MIN_VALID_POINTS, is kept.
    """
    pin = np.asarray(pin_dbm, dtype=float)
    values = np.asarray(point_iip3_dbm, dtype=float)
    sigma = np.fmax(np.nan_to_num(np.asarray(point_sigma_db, dtype=float), nan=np.inf), POINT_SCATTER_FLOOR_DB)
    idx = np.flatnonzero(valid)
    idx = idx[np.argsort(pin[idx], kind="stable")]
    out = np.zeros(pin.size, bool)
    keep_min = max(MIN_VALID_POINTS, (idx.size + 1) // 2)
    while idx.size > keep_min:
        top, rest = idx[-1], idx[:-1]
        rest_sigma = np.sqrt(np.add.reduce(sigma[rest] ** 2)) / rest.size
        if not np.isfinite(rest_sigma):
            break
        if abs(values[top] - mean_of(values[rest])) <= HIGH_ORDER_COVERAGE * math.hypot(sigma[top], rest_sigma):
            break
        out[top] = True
        idx = rest
    return out


# Reasons the fit counts its left-out points under (they appear in a refused fit's reason).
ANALYZER_MADE = "with the analyzer's own IM3 within 20 dB"
HIGH_ORDER = "biased by higher-order terms"


@dataclass(frozen=True)
class RegionFit:
    """The fit over the valid region and the top points left out for higher-order terms."""

    fit: SweepResult
    high_order: np.ndarray
    flags: PointFlags


def fit_excluding(a: dict[str, np.ndarray], over, exclude: dict[str, np.ndarray],
                  points: FitPoints | None = None) -> SweepResult:
    """fit_sweep over the sweep's arrays, leaving out the overloaded and the excluded points
    (points: the sweep's FitPoints when worked out already)."""
    if points is not None:
        fit_inputs = {name: a[name] for name in FIT_INPUTS}
        return fit_with_points({**fit_inputs, "overload": np.asarray(over, dtype=bool)}, points, exclude)
    return fit_sweep(a["tone_dbm"], a["pin1_dbm"], a["pin2_dbm"], a["pout_f1_dbm"], a["pout_f2_dbm"],
                     a["im3_lower_dbm"], a["im3_upper_dbm"], a["noise_lower_dbm"], a["noise_upper_dbm"],
                     over, exclude=exclude)


def fit_region(a: dict[str, np.ndarray], over, exclude: dict[str, np.ndarray],
               noise_err, points: FitPoints | None = None) -> tuple[SweepResult, np.ndarray]:
    """The fit over the valid region, its top trimmed where higher-order terms bias the IM3.

    Returns the fit and the points left out for that (fit.high_order_top; each point's scatter is
    taken as its noise error).
    """
    first = fit_excluding(a, over, {**exclude}, points)
    pin_mean = mean_pair(a["pin1_dbm"], a["pin2_dbm"])
    trimmed = high_order_top(pin_mean, first.point_iip3_dbm, noise_err, first.valid_mask)
    if first.iip3_dbm is None or not trimmed.any():
        return first, np.zeros_like(trimmed)
    return fit_excluding(a, over, {**exclude, HIGH_ORDER: trimmed}, points), trimmed


def fit_valid_region(a: dict[str, np.ndarray], over, analyzer_made, noise_err,
                     points: FitPoints | None = None) -> RegionFit:
    """Fit the sweep without the overloaded and analyzer-made points; flag the trimmed top
    (points: the sweep's FitPoints when worked out already)."""
    return region_fit(*fit_region(a, over, {ANALYZER_MADE: analyzer_made}, noise_err, points))


def region_fit(fit: SweepResult, high_order: np.ndarray) -> RegionFit:
    """The fit and its trimmed top, with the trimmed points' flags."""
    flags = flag_points(high_order, lambda i: Flag(
        fl.SLOPE, None,
        f"intercept {fit.point_iip3_dbm[i] - fit.iip3_dbm:+.2f} dB off the fitted region's: the local IM3 slope "
        "departs from 3 (higher-order terms); left out of the fit", None))
    return RegionFit(fit, high_order, flags)


@dataclass(frozen=True)
class CompressionCheck:
    """Per point, how far the gain is below the small-signal gain (dB, >= 0; zero without one)."""

    compression_db: np.ndarray
    flags: PointFlags


def check_compression(point_gain_db, small_signal_gain_db: float | None, over) -> CompressionCheck:
    """Flag the points whose gain departs from the small-signal gain by more than GAIN_TOLERANCE_DB."""
    gss = small_signal_gain_db
    if gss is None:
        return CompressionCheck(np.zeros(np.asarray(point_gain_db).size), ())
    deviation = point_gain_db - gss
    compression = np.maximum(0.0, -deviation)
    with np.errstate(invalid="ignore"):
        # An overloaded analyzer compresses its own readings: that point says nothing of the DUT.
        outside = (np.abs(deviation) > GAIN_TOLERANCE_DB) & ~over
    flags = flag_points(outside, lambda i: Flag(
        fl.COMPRESSED, None,
        f"gain {abs(deviation[i]):.2f} dB {'below' if deviation[i] < 0 else 'above'} the small-signal "
        f"{gss:.2f} dB (limit {GAIN_TOLERANCE_DB:g} dB)" + ("" if deviation[i] < 0 else ": expansion"),
        float(abs(deviation[i]) / 2.0)))
    return CompressionCheck(compression, flags)


def small_signal_usable(point_gain_db, small_signal_gain_db: float | None, usable) -> np.ndarray:
    """usable, narrowed to the points whose gain is within GAIN_TOLERANCE_DB of the small-signal gain."""
    if small_signal_gain_db is not None:
        usable = usable & (np.abs(point_gain_db - small_signal_gain_db) <= GAIN_TOLERANCE_DB)
    return usable
