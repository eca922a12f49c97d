"""Per-point checks of one sweep's readings, one named step each: noise, overload, tone imbalance.

Each takes the sweep's arrays (SweepData.arrays(): one value per point, raw_* at the analyzer
input, the others DUT-referred) and plain values, and returns what later steps need with its
point flags as (point index, Flag) pairs in point order (at most one flag per point and step).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tonebench.analysis import flags as fl
from tonebench.analysis.sweep_fit import IM3_OVER_NOISE_MIN_DB, noise_corrected_dbm
from tonebench.analysis.flags import Flag

PointFlags = tuple[tuple[int, Flag], ...]


def sliced(obj, part: slice):
    """A frozen dataclass of per-point arrays cut to one sweep's points (other fields as they are)."""
    return type(obj)(**{name: v[part] if isinstance(v, np.ndarray) else v for name, v in vars(obj).items()})


def flag_points(mask, make) -> PointFlags:
    """make(i) for every point i where mask is set, in point order."""
    return tuple((int(i), make(int(i))) for i in np.flatnonzero(mask))


def mean_pair(a, b) -> np.ndarray:
    """The mean of a lower and an upper value, in dB (per point)."""
    return (np.asarray(a, dtype=float) + np.asarray(b, dtype=float)) / 2.0


def _fmt(value: float) -> str:
    return "inf" if not math.isfinite(value) else f"{value:.2f}"


@dataclass(frozen=True)
class NoiseCheck:
    """IM3 over its noise, per point: the noise-corrected products (dBm), each product's reading over
    its floor (dB), the points too close to it, and the IIP3 error the noise may leave (dB; inf
    where the reading is only an upper bound)."""

    lower_dbm: np.ndarray
    upper_dbm: np.ndarray
    snr_lower_db: np.ndarray
    snr_upper_db: np.ndarray
    noisy: np.ndarray
    error_db: np.ndarray
    flags: PointFlags


def noise_values(a: dict[str, np.ndarray]) -> NoiseCheck:
    """check_noise without its flags: point by point, so one call may hold many sweeps' points."""
    lower_c, _ = noise_corrected_dbm(a["im3_lower_dbm"], a["noise_lower_dbm"])
    upper_c, _ = noise_corrected_dbm(a["im3_upper_dbm"], a["noise_upper_dbm"])
    snr_lower = fl.snr_db(a["im3_lower_dbm"], a["noise_lower_dbm"])
    snr_upper = fl.snr_db(a["im3_upper_dbm"], a["noise_upper_dbm"])
    with np.errstate(invalid="ignore"):
        noisy = np.fmin(snr_lower, snr_upper) < IM3_OVER_NOISE_MIN_DB
    noise_err = mean_pair(fl.noise_error_db(snr_lower), fl.noise_error_db(snr_upper))
    return NoiseCheck(lower_c, upper_c, snr_lower, snr_upper, noisy, noise_err, ())


def check_noise(a: dict[str, np.ndarray], values: NoiseCheck | None = None) -> NoiseCheck:
    """Correct both IM3 readings for their noise and flag the points within IM3_OVER_NOISE_MIN_DB
    (values: noise_values of these points when computed already)."""
    values = values or noise_values(a)
    lower_c, upper_c, snr_lower, snr_upper = values.lower_dbm, values.upper_dbm, values.snr_lower_db, values.snr_upper_db
    noisy, noise_err = values.noisy, values.error_db
    flags = flag_points(noisy, lambda i: Flag(
        fl.ANALYZER_LIMITED, fl.NOISE,
        f"IM3 {_fmt(snr_lower[i])} dB (lower) and {_fmt(snr_upper[i])} dB (upper) over the noise floor; "
        f"needs {IM3_OVER_NOISE_MIN_DB:g} dB" + ("; below 3 dB only an upper bound" if not np.isfinite(noise_err[i]) else ""),
        float(noise_err[i]) if np.isfinite(noise_err[i]) else None))
    return NoiseCheck(lower_c, upper_c, snr_lower, snr_upper, noisy, noise_err, flags)


@dataclass(frozen=True)
class OverloadCheck:
    """Overloaded points (reported by the analyzer, or its mixer level above max_mixer_dbm)."""

    over: np.ndarray
    mixer_dbm: np.ndarray
    flags: PointFlags


def mixer_level_dbm(raw_f1_dbm, raw_f2_dbm, atten_db) -> np.ndarray:
    """Both tones' total power at the analyzer's first mixer: the power sum less the attenuation."""
    raw_total_dbm = 10.0 * np.log10(10.0 ** (raw_f1_dbm / 10.0) + 10.0 ** (raw_f2_dbm / 10.0))
    return raw_total_dbm - atten_db


def check_overload(a: dict[str, np.ndarray], max_mixer_dbm: float | None,
                   mixer_dbm: np.ndarray | None = None) -> OverloadCheck:
    """Flag the points the analyzer reported overloaded or whose mixer level exceeds max_mixer_dbm
    (mixer_dbm: mixer_level_dbm of these points when computed already)."""
    reported = a["overload"].copy()
    if mixer_dbm is None:
        mixer_dbm = mixer_level_dbm(a["raw_f1_dbm"], a["raw_f2_dbm"], a["atten_db"])
    mixer_over = np.zeros(reported.size, bool)
    if max_mixer_dbm is not None:
        with np.errstate(invalid="ignore"):
            mixer_over = mixer_dbm > max_mixer_dbm
    flags = flag_points(reported | mixer_over, lambda i: Flag(
        fl.ANALYZER_LIMITED, fl.OVERLOAD,
        "the analyzer reported overload" if reported[i] else
        f"mixer level {mixer_dbm[i]:.1f} dBm above the analyzer's {max_mixer_dbm:g} dBm limit", None))
    return OverloadCheck(reported | mixer_over, mixer_dbm, flags)


@dataclass(frozen=True)
class ImbalanceCheck:
    """How far apart the two tones are at the DUT input (dB, per point) and where beyond the limit."""

    imbalance_db: np.ndarray
    unbalanced: np.ndarray
    flags: PointFlags


def check_imbalance(a: dict[str, np.ndarray]) -> ImbalanceCheck:
    """Flag the points whose tones differ by more than TONE_IMBALANCE_LIMIT_DB at the DUT input."""
    imbalance = np.abs(a["pin1_dbm"] - a["pin2_dbm"])
    with np.errstate(invalid="ignore"):
        unbalanced = imbalance > fl.TONE_IMBALANCE_LIMIT_DB
    flags = flag_points(unbalanced, lambda i: Flag(
        fl.TONE_IMBALANCE, None,
        f"tones {imbalance[i]:.2f} dB apart at the DUT input (limit {fl.TONE_IMBALANCE_LIMIT_DB:g} dB); "
        "the unequal-tone forms correct a memoryless device, the error shown is what they correct",
        float(imbalance[i] / 4.0)))
    return ImbalanceCheck(imbalance, unbalanced, flags)
