"""Per-point checks for IM3 the test system made, one named step each: the analyzer's own distortion
(the attenuation-step check and the prediction from the mixer TOI) and the sources' intermod
carried through the DUT gain.

Same conventions as point_checks: the sweep's arrays in, a small frozen result with its point
flags out; checks that could not be made are said in notes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tonebench.analysis import flags as fl
from tonebench.analysis.attenuation import analyzer_im3_dbm, implied_mixer_toi_dbm, residual_ip3_at_atten_dbm
from tonebench.analysis.sweep_fit import noise_corrected_dbm
from tonebench.analysis.flags import Flag, StepJudgement
from tonebench.analysis.phasor import intercept_error_db
from tonebench.analysis.point_checks import PointFlags, flag_points, mean_pair
from tonebench.analysis.settings import AnalysisSettings

SIDES = ("lower", "upper")


def side_tones(a: dict[str, np.ndarray], side: str) -> tuple[np.ndarray, np.ndarray]:
    """The raw tones in the order the product's form takes them (P1, P2)."""
    # The upper product is the lower one's form with the tones swapped (P1 + 2 P2).
    return (a["raw_f1_dbm"], a["raw_f2_dbm"]) if side == "lower" else (a["raw_f2_dbm"], a["raw_f1_dbm"])


def judge_steps(a: dict[str, np.ndarray]) -> dict[str, StepJudgement]:
    """The attenuation-step check of each product (flags.judge_step)."""
    return {
        side: fl.judge_step(a[f"raw_{side}_dbm"], a[f"raw_noise_{side}_dbm"], a[f"raw_{side}_step_dbm"],
                            a[f"raw_noise_{side}_step_dbm"], a["step_atten_db"])
        for side in SIDES
    }


def effective_mixer_toi_dbm(a: dict[str, np.ndarray], judged: dict[str, StepJudgement],
                            declared_dbm: float | None) -> tuple[float | None, float | None]:
    """(the lowest mixer TOI the step check implies, the lower of that and the declared one)."""
    implied = np.concatenate([
        np.where(judged[s].analyzer_made, implied_mixer_toi_dbm(*side_tones(a, s), a["atten_db"], judged[s].analyzer_dbm), np.nan)
        for s in SIDES])
    toi_step = float(np.nanmin(implied)) if np.isfinite(implied).any() else None
    candidates = [t for t in (declared_dbm, toi_step) if t is not None]
    return toi_step, (min(candidates) if candidates else None)


@dataclass(frozen=True)
class AnalyzerShare:
    """Per point: the reading over the analyzer's own product per side (dB; NaN: unknown), the IIP3
    error that product may put in (dB, mean of the sides), and whether the point is flagged."""

    ratio_db: dict[str, np.ndarray]
    error_db: np.ndarray
    flagged: np.ndarray


def raw_products_dbm(a: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Each raw IM3 reading corrected for its noise (analyzer input, dBm), per side."""
    return {s: noise_corrected_dbm(a[f"raw_{s}_dbm"], a[f"raw_noise_{s}_dbm"])[0] for s in SIDES}


def analyzer_share(a: dict[str, np.ndarray], judged: dict[str, StepJudgement], toi_dbm: float | None,
                   noisy: np.ndarray, raw_corrected: dict[str, np.ndarray] | None = None) -> AnalyzerShare:
    """The analyzer's own IM3, the larger of the step check's and the prediction from toi_dbm
    (raw_corrected: raw_products_dbm of these points when worked out already)."""
    n = a["tone_dbm"].size
    raw_corrected = raw_products_dbm(a) if raw_corrected is None else raw_corrected
    errors, ratios = {}, {}
    flagged = np.zeros(n, bool)
    for s in SIDES:
        predicted = (analyzer_im3_dbm(*side_tones(a, s), a["atten_db"], toi_dbm)[0] if toi_dbm is not None
                     else np.full(n, np.nan))
        estimate = np.fmax(predicted, judged[s].analyzer_dbm)
        ratio = raw_corrected[s] - estimate
        ratios[s] = ratio
        errors[s] = np.where(np.isfinite(ratio), intercept_error_db(ratio), 0.0)
        with np.errstate(invalid="ignore"):
            # Judged by prediction only where the reading is the product, not the noise floor.
            by_prediction = ~judged[s].conclusive & ~noisy & (ratio < fl.SYSTEM_MARGIN_DB)
        flagged |= judged[s].analyzer_made | by_prediction
    return AnalyzerShare(ratios, mean_pair(errors["lower"], errors["upper"]), flagged)


def distortion_flag(i: int, a: dict[str, np.ndarray], judged: dict[str, StepJudgement], share: AnalyzerShare,
                    toi_dbm: float | None) -> Flag:
    """Point i's analyzer-distortion flag: what the step check saw, or else the prediction."""
    made = [s for s in SIDES if judged[s].analyzer_made[i]]
    if made:
        detail = "; ".join(
            f"IM3 {s} moved {judged[s].change_db[i]:+.2f} dB with {a['step_atten_db'][i]:g} dB more "
            f"attenuation (a real product stays within {fl.STEP_CHANGE_LIMIT_DB:g} dB; beyond "
            f"{judged[s].limit_db[i]:.2f} dB noise cannot explain it)" for s in made)
    else:
        ratio = float(np.nanmin([share.ratio_db["lower"][i], share.ratio_db["upper"][i]]))
        detail = (f"the analyzer's own IM3 is predicted {ratio:.1f} dB under the reading "
                  f"(mixer TOI {toi_dbm:.1f} dBm, attenuation {a['atten_db'][i]:g} dB); "
                  f"needs {fl.SYSTEM_MARGIN_DB:g} dB")
    err = float(share.error_db[i])
    return Flag(fl.ANALYZER_LIMITED, fl.DISTORTION, detail, err if math.isfinite(err) else None)


def distortion_notes(a: dict[str, np.ndarray], judged: dict[str, StepJudgement],
                     toi_dbm: float | None) -> tuple[str, ...]:
    """The distortion checks that could not be made."""
    return distortion_notes_of(toi_dbm, bool(np.isfinite(a["raw_f1_dbm"]).any() and np.isfinite(a["atten_db"]).any()),
                               bool((judged["lower"].conclusive | judged["upper"].conclusive).any()))


def distortion_notes_of(toi_dbm: float | None, raw_and_atten_read: bool, any_conclusive: bool) -> tuple[str, ...]:
    """distortion_notes from what it looks at: a TOI, any raw tone and attenuation read, any
    conclusive step check."""
    notes = []
    if toi_dbm is None:
        notes.append("analyzer distortion not predicted: no mixer TOI for the analyzer")
    elif not raw_and_atten_read:
        notes.append("analyzer distortion not predicted: no raw tone readings or attenuation")
    if not any_conclusive:
        notes.append("no conclusive attenuation-step check in this sweep")
    return tuple(notes)


@dataclass(frozen=True)
class DistortionCheck:
    """The analyzer's own IM3 in one sweep.

    toi_step_dbm: the mixer TOI the step check shows (None: it showed none); toi_dbm: the one used,
    the lower of that and the declared; step_change_db: per point the larger |change| of the two
    products across the step (NaN: no conclusive check); step_made: the step check proved it.
    """

    judged: dict[str, StepJudgement]
    toi_step_dbm: float | None
    toi_dbm: float | None
    share: AnalyzerShare
    step_change_db: np.ndarray
    step_made: np.ndarray
    flags: PointFlags
    notes: tuple[str, ...]


def check_distortion(a: dict[str, np.ndarray], mixer_toi_dbm: float | None, noisy: np.ndarray,
                     judged: dict[str, StepJudgement] | None = None,
                     raw_corrected: dict[str, np.ndarray] | None = None) -> DistortionCheck:
    """Flag the points whose IM3 the analyzer may have made (step check or prediction); judged,
    raw_corrected: judge_steps and raw_products_dbm of these points when worked out already."""
    judged = judge_steps(a) if judged is None else judged
    toi_step, toi_eff = effective_mixer_toi_dbm(a, judged, mixer_toi_dbm)
    share = analyzer_share(a, judged, toi_eff, noisy, raw_corrected)
    step_change = np.fmax(np.abs(judged["lower"].change_db), np.abs(judged["upper"].change_db))
    step_change = np.where(judged["lower"].conclusive | judged["upper"].conclusive, step_change, np.nan)
    flags = flag_points(share.flagged, lambda i: distortion_flag(i, a, judged, share, toi_eff))
    return DistortionCheck(judged, toi_step, toi_eff, share, step_change,
                           judged["lower"].analyzer_made | judged["upper"].analyzer_made,
                           flags, distortion_notes(a, judged, toi_eff))


def residual_words(settings: AnalysisSettings, ip3_dbm: float, atten_db: float) -> str:
    """The system residual charged, in words."""
    if settings.residual_atten_db is None:
        return f"intercept {ip3_dbm:.1f} dBm at the DUT input"
    source = ("none resolved" if settings.source_ip3_dbm is None else
              f"{'at least ' if settings.source_ip3_is_bound else ''}{settings.source_ip3_dbm:.1f} dBm")
    where = "" if not math.isfinite(atten_db) else f" at {atten_db:g} dB attenuation"
    return f"intercept {ip3_dbm:.1f} dBm at the DUT input{where}; sources' share {source}"


@dataclass(frozen=True)
class SourceCheck:
    """The sources' residual IM3, per point: the IIP3 error it may put in (dB) and where flagged."""

    error_db: np.ndarray
    flagged: np.ndarray
    flags: PointFlags
    notes: tuple[str, ...]


def check_source_intermod(a: dict[str, np.ndarray], settings: AnalysisSettings, lower_dbm, upper_dbm,
                          gain_db) -> SourceCheck:
    """The sources' residual IM3 carried through the DUT gain, against the noise-corrected products.

    The residual is the one that applies at the attenuation each point was measured with
    (AnalysisSettings): a share the thru could not resolve is charged at its bound.
    """
    n = lower_dbm.size
    if settings.system_ip3_dbm is None:
        note = "source intermod not checked: " + (settings.system_note or "no system residual known")
        return SourceCheck(np.zeros(n), np.zeros(n, bool), (), (note,))
    if settings.residual_atten_db is None:
        ip3 = np.full(n, float(settings.system_ip3_dbm))
    else:
        ip3 = residual_ip3_at_atten_dbm(settings.source_ip3_dbm, settings.analyzer_ip3_dbm,
                                        settings.residual_atten_db, a["atten_db"])
    residual = {"lower": 2.0 * a["pin1_dbm"] + a["pin2_dbm"] - 2.0 * ip3 + gain_db,
                "upper": a["pin1_dbm"] + 2.0 * a["pin2_dbm"] - 2.0 * ip3 + gain_db}
    ratio = {"lower": lower_dbm - residual["lower"], "upper": upper_dbm - residual["upper"]}
    with np.errstate(invalid="ignore"):
        source_err = mean_pair(intercept_error_db(ratio["lower"]), intercept_error_db(ratio["upper"]))
        source_flag = np.fmin(ratio["lower"], ratio["upper"]) < fl.SYSTEM_MARGIN_DB
    flags = flag_points(source_flag, lambda i: Flag(
        fl.SOURCE_INTERMOD_LIMITED, None,
        f"IM3 only {min(ratio['lower'][i], ratio['upper'][i]):.1f} dB over the system's residual "
        f"({residual_words(settings, ip3[i], a['atten_db'][i])}) carried through the {gain_db[i]:.1f} dB gain; "
        f"needs {fl.SYSTEM_MARGIN_DB:g} dB",
        float(source_err[i]) if np.isfinite(source_err[i]) else None))
    return SourceCheck(source_err, source_flag, flags, ())
