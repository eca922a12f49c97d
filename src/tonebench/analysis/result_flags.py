"""The flags on a sweep's result, from the per-point steps: what cost the intercept or may bias it.

Named steps, one per kind of flag; each returns the flags it adds (a list, possibly empty).
"""

from __future__ import annotations

import math

import numpy as np

from tonebench.analysis import flags as fl
from tonebench.analysis.sweep_fit import GAIN_TOLERANCE_DB, SweepResult
from tonebench.analysis.flags import Flag
from tonebench.analysis.point_checks import ImbalanceCheck
from tonebench.analysis.settings import AnalysisSettings
from tonebench.analysis.system_checks import DistortionCheck, SourceCheck, residual_words


def count_words(mask) -> str:
    """'k of n points' for a per-point mask."""
    return f"{int(np.sum(mask))} of {np.asarray(mask).size} points"


def distortion_result(distortion: DistortionCheck, declared_toi_dbm: float | None, refused: bool,
                      error_db: float | None) -> list[Flag]:
    """Shown when the step check proved it on the bench, or when it cost the intercept."""
    flagged = distortion.share.flagged
    if not (distortion.step_made.any() or (refused and flagged.any())):
        return []
    toi_step = distortion.toi_step_dbm
    shown = toi_step is not None and (declared_toi_dbm is None or toi_step < declared_toi_dbm)
    return [Flag(
        fl.ANALYZER_LIMITED, fl.DISTORTION,
        f"{count_words(flagged)} carry the analyzer's own IM3 and are left out; mixer TOI "
        f"{distortion.toi_dbm:.1f} dBm" + (f" (the step check shows it; {declared_toi_dbm:g} dBm declared)"
                                           if shown else "") + "; raise the analyzer attenuation",
        error_db)]


def refusal_results(noisy, over, compression_db, at_least_dbm: float | None) -> list[Flag]:
    """Why a refused intercept was refused: noise, overload, compression."""
    out: list[Flag] = []
    for mask, flag, cause, why in (
        (noisy, fl.ANALYZER_LIMITED, fl.NOISE, "IM3 within 10 dB of the noise floor"),
        (over, fl.ANALYZER_LIMITED, fl.OVERLOAD, "overloaded"),
    ):
        if mask.any():
            detail = f"intercept refused: {count_words(mask)} {why}"
            if cause == fl.NOISE and at_least_dbm is not None:
                detail += f"; the readings still prove IIP3 >= {at_least_dbm:.2f} dBm"
            out.append(Flag(flag, cause, detail, None))
    compressed = (compression_db > GAIN_TOLERANCE_DB) & ~over
    if compressed.any():
        out.append(Flag(fl.COMPRESSED, None, f"intercept refused: {count_words(compressed)} compressed", None))
    return out


def source_result(source: SourceCheck, settings: AnalysisSettings, scope, error_db: float | None) -> list[Flag]:
    """Points within the margin of the system's residual among those in scope."""
    hit = source.flagged & scope
    if not hit.any():
        return []
    words = residual_words(settings, settings.system_ip3_dbm, settings.residual_atten_db or math.nan)
    return [Flag(
        fl.SOURCE_INTERMOD_LIMITED, None,
        f"{count_words(hit)} within {fl.SYSTEM_MARGIN_DB:g} dB of the system's residual IM3 "
        f"({words}); a better combiner or isolator helps",
        error_db if error_db is None or math.isfinite(error_db) else None)]


def imbalance_result(imbalance: ImbalanceCheck, scope) -> list[Flag]:
    """Points in scope whose tones are too far apart; the error is the worst one's."""
    hit = imbalance.unbalanced & scope
    if not hit.any():
        return []
    return [Flag(fl.TONE_IMBALANCE, None,
                 f"{count_words(hit)} with the tones more than {fl.TONE_IMBALANCE_LIMIT_DB:g} dB apart",
                 float(np.max(imbalance.imbalance_db[hit]) / 4.0))]


def slope_result(fit: SweepResult) -> list[Flag]:
    """A free IM3 slope away from 3; the error is the gap between the free and fixed intercepts."""
    slopes = [s for s in (fit.slope_im3_lower, fit.slope_im3_upper) if s is not None]
    if not (slopes and any(abs(s - 3.0) > fl.SLOPE_TOLERANCE for s in slopes)):
        return []
    err = None if fit.iip3_free_dbm is None else abs(fit.iip3_free_dbm - fit.iip3_dbm)
    return [Flag(
        fl.SLOPE, None,
        f"free IM3 slope {fit.slope_im3_lower:.2f} (lower), {fit.slope_im3_upper:.2f} (upper); "
        f"expected 3 +/- {fl.SLOPE_TOLERANCE:g} in the fitted region",
        err)]
