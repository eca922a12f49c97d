"""The analyzer's own LO phase noise at close tone spacing (reciprocal mixing).

Each tone's phase-noise skirt, copied onto it by the analyzer's LO, lies on the IM3 product df
(adjacent tone) and 2 df (far tone) away; through the RBW filter it reads as noise of
P_adjacent L(df) + P_far L(2 df), times the noise bandwidth (common practice, from memory). A product
within PHASE_NOISE_MARGIN_DB of that floor is the analyzer's as much as the device's.

L comes from the dialect's [performance] phase_noise_dbc_per_hz at phase_noise_offset_hz (or the
bench file's), carried to other offsets at -20 dB per decade, the 1/f^2 region of an oscillator
(Leeson's model, from memory). Closer in than the stated offset a synthesizer's loop usually keeps
it flatter, so the floor predicted there is on the high side: the check errs towards flagging.
Pure numpy, like the rest of the analysis; readings at the analyzer input (raw_*).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tonebench.analysis import flags as fl
from tonebench.analysis.flags import Flag
from tonebench.analysis.point_checks import PointFlags, flag_points, mean_pair
from tonebench.analysis.settings import AnalysisSettings

# Reciprocal mixing is noise, so it needs the margin the noise marker rule asks (point_checks).
PHASE_NOISE_MARGIN_DB = 10.0
# Equivalent noise bandwidth of a Gaussian RBW filter over its 3 dB bandwidth: sqrt(pi / (4 ln 2))
# (common practice for swept analyzers, from memory; real filters lie within a few percent).
GAUSSIAN_ENBW_PER_RBW = math.sqrt(math.pi / (4.0 * math.log(2.0)))
# A point's limit is the phase noise's, not the thermal noise's, when the predicted skirt is at least
# this close under the noise marker's reading (a marker a little farther out reads the skirt too).
SHARE_OF_NOISE_DB = 3.0


def phase_noise_dbc_per_hz(offset_hz, dbc_per_hz: float, at_offset_hz: float) -> np.ndarray:
    """L(offset) in dBc/Hz from one stated figure, at -20 dB per decade."""
    return dbc_per_hz - 20.0 * np.log10(np.asarray(offset_hz, dtype=float) / at_offset_hz)


def reciprocal_floor_dbm(adjacent_dbm, far_dbm, spacing_hz: float, rbw_hz, dbc_per_hz: float,
                         at_offset_hz: float) -> np.ndarray:
    """The skirts' power read at an IM3 product (dBm): adjacent tone df away, far tone 2 df away."""
    density = (10.0 ** ((np.asarray(adjacent_dbm, float) + phase_noise_dbc_per_hz(spacing_hz, dbc_per_hz, at_offset_hz)) / 10.0)
               + 10.0 ** ((np.asarray(far_dbm, float) + phase_noise_dbc_per_hz(2.0 * spacing_hz, dbc_per_hz, at_offset_hz)) / 10.0))
    return 10.0 * np.log10(density * GAUSSIAN_ENBW_PER_RBW * np.asarray(rbw_hz, dtype=float))


@dataclass(frozen=True)
class PhaseNoiseCheck:
    """Per point: each product's margin over the reciprocal-mixing floor (dB, NaN: not checked),
    where it is within PHASE_NOISE_MARGIN_DB, and the IIP3 error the floor may leave (dB)."""

    margin_lower_db: np.ndarray
    margin_upper_db: np.ndarray
    skirt_share: np.ndarray  # the predicted skirt within SHARE_OF_NOISE_DB of a noise marker's reading
    flagged: np.ndarray
    error_db: np.ndarray
    flags: PointFlags


def check_phase_noise(a: dict[str, np.ndarray], settings: AnalysisSettings) -> PhaseNoiseCheck:
    """Flag the points whose IM3 lies within the margin of the analyzer's reciprocal-mixing floor."""
    n = a["tone_dbm"].size
    nan = np.full(n, np.nan)
    if settings.phase_noise_dbc_per_hz is None or settings.phase_noise_offset_hz is None or not settings.spacing_hz:
        return PhaseNoiseCheck(nan, nan, np.zeros(n, bool), np.zeros(n, bool), np.zeros(n), ())
    figure = (settings.spacing_hz, a["rbw_hz"], settings.phase_noise_dbc_per_hz, settings.phase_noise_offset_hz)
    floor = {"lower": reciprocal_floor_dbm(a["raw_f1_dbm"], a["raw_f2_dbm"], *figure),
             "upper": reciprocal_floor_dbm(a["raw_f2_dbm"], a["raw_f1_dbm"], *figure)}
    margin = {side: a[f"raw_{side}_dbm"] - floor[side] for side in floor}
    with np.errstate(invalid="ignore"):
        # No noise marker read (NaN): the skirt counts as the limit.
        share = np.zeros(n, bool)
        for side in floor:
            share |= ~(floor[side] < a[f"raw_noise_{side}_dbm"] - SHARE_OF_NOISE_DB)
        flagged = np.fmin(margin["lower"], margin["upper"]) < PHASE_NOISE_MARGIN_DB
        error = mean_pair(fl.noise_error_db(margin["lower"]), fl.noise_error_db(margin["upper"]))
    words = (f"L = {settings.phase_noise_dbc_per_hz:g} dBc/Hz at {settings.phase_noise_offset_hz:g} Hz, "
             f"{settings.spacing_hz:g} Hz spacing")
    flags = flag_points(flagged, lambda i: Flag(
        fl.ANALYZER_LIMITED, fl.NOISE,
        f"IM3 {margin['lower'][i]:.1f} dB (lower) and {margin['upper'][i]:.1f} dB (upper) over the analyzer's "
        f"reciprocal-mixing floor (its LO phase noise on the tones: {words}); needs {PHASE_NOISE_MARGIN_DB:g} dB",
        float(error[i]) if np.isfinite(error[i]) else None))
    return PhaseNoiseCheck(margin["lower"], margin["upper"], share, flagged, np.where(np.isfinite(error), error, np.nan), flags)


def phase_noise_result(check: PhaseNoiseCheck, settings: AnalysisSettings, over, fitted) -> list[Flag]:
    """Shown when the skirt, not the thermal noise, limited points left out of the fit (a point
    under the skirt is often under the noise marker too: the marker reads the skirt a little
    farther out); its error is the largest the skirt may still leave in a fitted point (None when
    the intercept was refused)."""
    cost = check.flagged & check.skirt_share & ~over
    if not cost.any():
        return []
    in_fit = np.asarray(fitted, bool)
    error = float(np.nanmax(check.error_db[in_fit])) if in_fit.any() else None
    return [Flag(
        fl.ANALYZER_LIMITED, fl.NOISE,
        f"{int(cost.sum())} of {cost.size} points within {PHASE_NOISE_MARGIN_DB:g} dB of the analyzer's "
        f"reciprocal-mixing floor (LO phase noise {settings.phase_noise_dbc_per_hz:g} dBc/Hz at "
        f"{settings.phase_noise_offset_hz:g} Hz, at {settings.spacing_hz:g} Hz spacing) and left out; "
        "an analyzer with lower phase noise or a wider spacing helps",
        error if error is not None and math.isfinite(error) else None)]
