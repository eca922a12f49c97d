"""system_checks.check_distortion for many sweeps at once: the mixer TOI the step check implies
as a segment minimum (np.fmin.reduceat, NaN-skipping like np.nanmin), then the analyzer's share
point by point over all the sweeps, each point against its own sweep's TOI. Only the flags (with
their texts) and the notes are made sweep by sweep, and flags only where a point is flagged.
Every step is elementwise or a minimum, so each sweep gets exactly what check_distortion gives it.
"""

from __future__ import annotations

import numpy as np

from tonebench.analysis import flags as fl
from tonebench.analysis.attenuation import analyzer_im3_dbm, implied_mixer_toi_dbm
from tonebench.analysis.flags import StepJudgement
from tonebench.analysis.phasor import intercept_error_db
from tonebench.analysis.point_checks import flag_points, mean_pair
from tonebench.analysis.system_checks import (
    SIDES,
    AnalyzerShare,
    DistortionCheck,
    distortion_flag,
    distortion_notes_of,
    side_tones,
)


def _any_per_sweep(mask: np.ndarray, starts: np.ndarray) -> np.ndarray:
    return np.logical_or.reduceat(mask, starts)


def _step_tois_dbm(a: dict[str, np.ndarray], judged: dict[str, StepJudgement], starts: np.ndarray) -> list[float | None]:
    """Per sweep, effective_mixer_toi_dbm's first value: the lowest TOI the step check implies."""
    implied = [np.where(judged[s].analyzer_made,
                        implied_mixer_toi_dbm(*side_tones(a, s), a["atten_db"], judged[s].analyzer_dbm), np.nan)
               for s in SIDES]
    lowest = np.fmin.reduceat(np.fmin(*implied), starts)
    seen = _any_per_sweep(np.isfinite(implied[0]) | np.isfinite(implied[1]), starts)
    return [float(v) if ok else None for v, ok in zip(lowest.tolist(), seen.tolist())]


def distortion_checks(a: dict[str, np.ndarray], judged: dict[str, StepJudgement], raw_corrected: dict[str, np.ndarray],
                      noisy: np.ndarray, starts: np.ndarray, declared_toi_dbm: list[float | None],
                      judged_parts: list[dict[str, StepJudgement]]) -> list[DistortionCheck]:
    """check_distortion(each sweep's arrays, its declared mixer TOI, noisy, judged, raw_corrected)
    for sweeps back to back from `starts` (none empty); the arguments are all the sweeps' points,
    but judged_parts: judged cut to each sweep."""
    n_points = a["tone_dbm"].size
    stops = np.append(starts[1:], n_points).tolist()
    toi_step = _step_tois_dbm(a, judged, starts)
    toi_eff = []
    for step, declared in zip(toi_step, declared_toi_dbm):
        candidates = [t for t in (declared, step) if t is not None]
        toi_eff.append(min(candidates) if candidates else None)
    # Each point against its sweep's TOI (NaN: none, so no prediction, as np.full(n, nan) alone).
    toi_point = np.repeat(np.array([np.nan if t is None else t for t in toi_eff]), np.diff([*starts.tolist(), n_points]))

    errors, ratios = {}, {}
    flagged = np.zeros(n_points, bool)
    for s in SIDES:
        predicted = analyzer_im3_dbm(*side_tones(a, s), a["atten_db"], toi_point)[0]
        estimate = np.fmax(predicted, judged[s].analyzer_dbm)
        ratio = raw_corrected[s] - estimate
        ratios[s] = ratio
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            errors[s] = np.where(np.isfinite(ratio), intercept_error_db(ratio), 0.0)
            by_prediction = ~judged[s].conclusive & ~noisy & (ratio < fl.SYSTEM_MARGIN_DB)
        flagged |= judged[s].analyzer_made | by_prediction
    error_db = mean_pair(errors["lower"], errors["upper"])
    step_change = np.fmax(np.abs(judged["lower"].change_db), np.abs(judged["upper"].change_db))
    conclusive = judged["lower"].conclusive | judged["upper"].conclusive
    step_change = np.where(conclusive, step_change, np.nan)
    step_made = judged["lower"].analyzer_made | judged["upper"].analyzer_made

    # distortion_notes, per sweep from three segment any's.
    raw_seen = _any_per_sweep(np.isfinite(a["raw_f1_dbm"]), starts).tolist()
    atten_seen = _any_per_sweep(np.isfinite(a["atten_db"]), starts).tolist()
    conclusive_seen = _any_per_sweep(conclusive, starts).tolist()
    any_flagged = _any_per_sweep(flagged, starts).tolist()

    out = []
    for i, (start, stop) in enumerate(zip(starts.tolist(), stops)):
        part = slice(start, stop)
        share = AnalyzerShare({s: ratios[s][part] for s in SIDES}, error_db[part], flagged[part])
        sweep_judged = judged_parts[i]
        flags = ()
        if any_flagged[i]:
            sweep_a = {name: arr[part] for name, arr in a.items()}
            flags = flag_points(share.flagged, lambda j, sa=sweep_a, sj=sweep_judged, sh=share, t=toi_eff[i]:
                                distortion_flag(j, sa, sj, sh, t))
        notes = distortion_notes_of(toi_eff[i], raw_seen[i] and atten_seen[i], conclusive_seen[i])
        out.append(DistortionCheck(sweep_judged, toi_step[i], toi_eff[i], share, step_change[part], step_made[part],
                                   flags, notes))
    return out
