"""Readings taken with a detector or averaging whose noise reading is biased, made power readings.

The noise correction (sweep_fit.noise_corrected_dbm) subtracts powers: it is right for readings
that are power means (an RMS detector, or any detector with power averaging). Each point stores
the mode it was read with (extra_json: detector, average_type; instruments/detector_setup.py);
here each (product, noise marker) pair of such a point is turned into the power readings the
correction expects, before any analysis sees them:

  sample detector, log averaging: the mean of 10 log10 of an envelope power. Noise alone reads
    10 log10(e) * Euler's gamma = 2.507 dB low (from memory: the Rayleigh-envelope result behind
    the common-practice 2.5 dB log-averaging correction), so the noise marker is raised by it. A
    line of power S in noise of power N reads the Rician log mean
        10 log10(N) + 10 log10(e) (ln K + E1(K)),  K = S/N
    (E1 the exponential integral; the log moment of a non-central chi-square variable with two
    degrees of freedom, from memory, checked by simulation in tests/analysis/test_detectors.py),
    which is solved for K; the product becomes N (1 + K), what a power mean would have read.
  rms detector, log averaging: the dB mean of power means of k samples each reads
    10 log10(e) (psi(k) - ln k), under 0.22 dB low for k >= 10; k is the instrument's (samples per
    display point) and not known here, so the readings are taken as power readings, uncorrected,
    and the result's notes say so (log_rms_notes).
  peak detector: noise reads high by an amount set by the samples per display point (+5.3 dB for
    16, sim/detector.py): no correction is claimed; points whose product lies within
    NOISE_CORRECT_MAX_DB of the noise marker are flagged (detector_flags).
Points with no stored mode (every run before these settings) are left exactly as read.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import exp1

from tonebench.analysis import flags as fl
from tonebench.analysis.point_checks import PointFlags, flag_points
from tonebench.analysis.sweep_fit import NOISE_CORRECT_MAX_DB

EULER_GAMMA = 0.5772156649015329
DB_PER_NEPER_POWER = 10.0 / math.log(10.0)  # 10 log10(e): dB per unit of ln(power)
LOG_SAMPLE_BIAS_DB = -DB_PER_NEPER_POWER * EULER_GAMMA  # -2.507 dB

# (product, its noise marker) pairs of the analysis input (results/sweeps.py sweep_data).
READING_PAIRS = (
    ("im3_lower_dbm", "noise_lower_dbm"), ("im3_upper_dbm", "noise_upper_dbm"),
    ("raw_lower_dbm", "raw_noise_lower_dbm"), ("raw_upper_dbm", "raw_noise_upper_dbm"),
    ("raw_lower_step_dbm", "raw_noise_lower_step_dbm"), ("raw_upper_step_dbm", "raw_noise_upper_step_dbm"),
    ("im2_diff_dbm", "noise_diff_dbm"), ("im2_sum_dbm", "noise_sum_dbm"),
)


def rician_log_excess_db(k) -> np.ndarray:
    """Mean of 10 log10 |line + noise|^2 over 10 log10 of the mean noise power (dB), K = S/N >= 0."""
    k = np.asarray(k, dtype=float)
    with np.errstate(divide="ignore"):
        return DB_PER_NEPER_POWER * np.where(k > 0.0, np.log(np.where(k > 0, k, 1.0)) + exp1(np.where(k > 0, k, 1.0)),
                                             -EULER_GAMMA)


def line_to_noise_from_log_mean(excess_db) -> np.ndarray:
    """K = S/N whose Rician log mean lies excess_db over 10 log10 N: the inverse of
    rician_log_excess_db (monotonic), by bisection in ln K; 0 at or below the noise-alone -2.507 dB."""
    excess = np.asarray(excess_db, dtype=float)
    low, high = np.full(excess.shape, -30.0), np.full(excess.shape, 30.0)  # ln K
    for _ in range(60):  # 60 halvings of 60 nepers: far below 1e-6 dB
        mid = 0.5 * (low + high)
        above = rician_log_excess_db(np.exp(mid)) > excess
        high, low = np.where(above, mid, high), np.where(above, low, mid)
    k = np.exp(0.5 * (low + high))
    return np.where(excess <= LOG_SAMPLE_BIAS_DB, 0.0, np.where(np.isfinite(excess), k, np.nan))


def modes_of(extras: list[dict]) -> tuple[np.ndarray, np.ndarray]:
    """(detector, average_type) per point from its extra_json dict ('' where not stored)."""
    return (np.array([e.get("detector", "") for e in extras], dtype=object),
            np.array([e.get("average_type", "") for e in extras], dtype=object))


def as_power_readings(values: dict[str, np.ndarray], detector, average_type) -> dict[str, np.ndarray]:
    """`values` with each READING_PAIRS pair of a log-averaged sample-detector point made power
    readings (see the module docstring); other points and absent pairs as they were."""
    log_sample = (np.asarray(detector) == "sample") & (np.asarray(average_type) == "log")
    if not log_sample.any():
        return values
    out = dict(values)
    for product, noise in READING_PAIRS:
        if values.get(product) is None or values.get(noise) is None:
            continue
        reading = np.asarray(values[product], dtype=float)
        noise_dbm = np.asarray(values[noise], dtype=float) - LOG_SAMPLE_BIAS_DB
        k = line_to_noise_from_log_mean(reading - noise_dbm)
        with np.errstate(divide="ignore", invalid="ignore"):
            power_dbm = noise_dbm + 10.0 * np.log10(1.0 + k)
        out[product] = np.where(log_sample & np.isfinite(power_dbm), power_dbm, reading)
        out[noise] = np.where(log_sample, noise_dbm, values[noise])
    return out


def peak_mask(detector) -> np.ndarray:
    """1.0 where the point was read with a peak detector, else 0.0 (a SweepData float array)."""
    return (np.asarray(detector) == "peak").astype(float)


def log_rms_mask(detector, average_type) -> np.ndarray:
    """1.0 where the point was read with an rms detector and log averaging, else 0.0."""
    return ((np.asarray(detector) == "rms") & (np.asarray(average_type) == "log")).astype(float)


# rms detector, log averaging: 10 log10(e) (psi(k) - ln k) at k = 10 samples per display point.
LOG_RMS_BIAS_AT_10_DB = -0.22


def log_rms_notes(a: dict[str, np.ndarray]) -> list[str]:
    """A note on the result when some of its points were read with an rms detector and log
    averaging: their noise reads a little low by an amount the instrument's samples per point set,
    so it is said, not corrected (see the module docstring)."""
    n_points = int(np.count_nonzero(np.nan_to_num(a.get("noise_log_rms", np.zeros(0)), nan=0.0) > 0.0))
    if n_points == 0:
        return []
    return [f"noise of {n_points} points read with an rms detector and log averaging: up to "
            f"{-LOG_RMS_BIAS_AT_10_DB:.2f} dB low (10 or more samples per display point), not corrected; "
            f"power averaging reads it without bias"]


def detector_flags(a: dict[str, np.ndarray], noisy) -> PointFlags:
    """Peak-detected points not already noise-flagged whose IM3 lies within NOISE_CORRECT_MAX_DB of
    its noise marker: the correction subtracted a noise reading known to read high by an amount
    not known here, so the point is flagged analyzer-limited (noise), no error figure claimed."""
    peak = np.nan_to_num(a.get("noise_peak_detected", np.zeros(np.size(noisy))), nan=0.0) > 0.0
    with np.errstate(invalid="ignore"):
        snr = np.fmin(fl.snr_db(a["im3_lower_dbm"], a["noise_lower_dbm"]),
                      fl.snr_db(a["im3_upper_dbm"], a["noise_upper_dbm"]))
        near = snr < NOISE_CORRECT_MAX_DB
    return flag_points(peak & near & ~np.asarray(noisy, dtype=bool), lambda i: fl.Flag(
        fl.ANALYZER_LIMITED, fl.NOISE,
        f"peak detector: its noise reading is biased high by an amount set by the samples per display "
        f"point, so the noise correction of IM3 {snr[i]:.2f} dB over it is not claimed; use rms or sample", None))
