"""The analyzer's own limits versus its input attenuation (design sections 4 and 5).

Everything is referred to the analyzer input connector, in dBm. With attenuation A the first mixer
sees the input less A; its third-order intercept TOI (mixer_toi_dbm, at 0 dB attenuation) is then
TOI + A at the input, and its noise floor DANL + 10log10(RBW) + A.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

# The analyzer's IM3 adds to the device's as a phasor (it biases the reading, design sec. 4), its
# noise adds in power and is subtracted; so the optimum puts the analyzer's IM3 this far under its
# noise floor. Equivalently: the margins to the expected IM3 exceed the 20 dB (distortion) and
# 10 dB (noise) rules by the same amount. 0 would give the textbook dynamic-range optimum.
DISTORTION_BELOW_NOISE_DB = 20.0
# Keep the mixer this far under its overload level at the chosen attenuation.
OVERLOAD_MARGIN_DB = 3.0


def analyzer_im3_dbm(tone1_dbm, tone2_dbm, atten_db, mixer_toi_dbm) -> tuple[np.ndarray, np.ndarray]:
    """The analyzer's own IM3 (lower 2f1-f2, upper 2f2-f1) at its input, for tones at its input.

    Its input intercept is TOI + atten, so lower = 2 P1 + P2 - 2 (TOI + A), upper = P1 + 2 P2 - ...
    """
    p1 = np.asarray(tone1_dbm, dtype=float)
    p2 = np.asarray(tone2_dbm, dtype=float)
    ip3_dbm = np.asarray(mixer_toi_dbm, dtype=float) + np.asarray(atten_db, dtype=float)
    return 2.0 * p1 + p2 - 2.0 * ip3_dbm, p1 + 2.0 * p2 - 2.0 * ip3_dbm


def analyzer_noise_dbm(danl_dbm_per_hz: float, rbw_hz: float, atten_db) -> np.ndarray:
    """Noise floor in the RBW at the analyzer input: DANL(1 Hz) + 10log10(RBW) + attenuation."""
    return danl_dbm_per_hz + 10.0 * math.log10(rbw_hz) + np.asarray(atten_db, dtype=float)


def implied_mixer_toi_dbm(tone1_dbm, tone2_dbm, atten_db, analyzer_im3_lower_dbm) -> np.ndarray:
    """Mixer TOI (0 dB attenuation) that would make analyzer_im3_lower_dbm at 2f1-f2 (inverse of above)."""
    p1 = np.asarray(tone1_dbm, dtype=float)
    p2 = np.asarray(tone2_dbm, dtype=float)
    return (2.0 * p1 + p2 - np.asarray(analyzer_im3_lower_dbm, dtype=float)) / 2.0 - np.asarray(atten_db, dtype=float)


def residual_ip3_at_atten_dbm(source_ip3_dbm, analyzer_ip3_dbm, base_atten_db, atten_db) -> np.ndarray:
    """The test system's residual intercept (dBm, DUT input plane) at each attenuation atten_db.

    Its two shares add in phase (the worst case, as calibration/residual.py splits them): the
    sources' k_src = 10^(-IP3src/10) stays, the analyzer's k_an (measured at base_atten_db) scales
    by 10^(-(A - A0)/10), its input intercept rising dB for dB with attenuation. A share given as
    None is taken as absent; an unknown attenuation (NaN) as the base one.
    """
    atten = np.asarray(atten_db, dtype=float)
    atten = np.where(np.isfinite(atten), atten, base_atten_db)
    k = np.zeros(atten.shape)
    if source_ip3_dbm is not None:
        k = k + 10.0 ** (-source_ip3_dbm / 10.0)
    if analyzer_ip3_dbm is not None:
        k = k + 10.0 ** (-(analyzer_ip3_dbm + atten - base_atten_db) / 10.0)
    with np.errstate(divide="ignore"):
        return -10.0 * np.log10(k)


@dataclass(frozen=True)
class AttenChoice:
    """The attenuation chosen for one point and what the analyzer is predicted to add there (dBm)."""

    atten_db: float
    analyzer_im3_dbm: float  # its own IM3 at its input (per product, equal tones)
    noise_dbm: float  # its noise floor in the RBW at its input
    limited_by: str  # "optimum", "overload", "min_atten", "max_atten"


def optimum_atten_db(
    tone_dbm: float,
    mixer_toi_dbm: float,
    danl_dbm_per_hz: float,
    rbw_hz: float,
    min_atten_db: float,
    max_atten_db: float,
    atten_step_db: float,
    max_mixer_dbm: float | None = None,
    distortion_below_noise_db: float = DISTORTION_BELOW_NOISE_DB,
) -> AttenChoice:
    """The dynamic-range optimum for two tones of tone_dbm each at the analyzer input.

    The analyzer's IM3, 3P - 2(TOI + A), falls 2 dB per dB of A while its noise, N0 + A, rises
    1 dB per dB; they stand distortion_below_noise_db apart where
        3P - 2 TOI - 2A = N0 + A - d   =>   A = (3P - 2 TOI - N0 + d) / 3.
    The result is rounded up to the attenuator's step (more margin on the coherent term), raised
    to keep the mixer (both tones: P + 3 dB - A) OVERLOAD_MARGIN_DB under max_mixer_dbm, and held
    within the attenuator's range.
    """
    noise0_dbm = float(analyzer_noise_dbm(danl_dbm_per_hz, rbw_hz, 0.0))
    ideal_db = (3.0 * tone_dbm - 2.0 * mixer_toi_dbm - noise0_dbm + distortion_below_noise_db) / 3.0
    atten_db = math.ceil(ideal_db / atten_step_db - 1e-9) * atten_step_db
    limited_by = "optimum"
    if max_mixer_dbm is not None:
        total_dbm = tone_dbm + 10.0 * math.log10(2.0)
        floor_db = math.ceil((total_dbm - max_mixer_dbm + OVERLOAD_MARGIN_DB) / atten_step_db - 1e-9) * atten_step_db
        if floor_db > atten_db:
            atten_db, limited_by = floor_db, "overload"
    if atten_db < min_atten_db:
        atten_db, limited_by = min_atten_db, "min_atten"
    if atten_db > max_atten_db:
        atten_db, limited_by = max_atten_db, "max_atten"
    lower_dbm, _ = analyzer_im3_dbm(tone_dbm, tone_dbm, atten_db, mixer_toi_dbm)
    return AttenChoice(float(atten_db), float(lower_dbm), noise0_dbm + float(atten_db), limited_by)
