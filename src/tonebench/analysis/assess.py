"""One sweep from readings to a trustworthy result: flags per point and per result, the valid
region, the fits, the IIP3 bound, and IIP2 when second-order products were read.

Pure numpy over 1-D arrays, one value per point (design sections 3 and 4). Raw readings (raw_*)
are at the analyzer input; the others are DUT-referred, like the store's Point columns.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields

import numpy as np

from tonebench.analysis import flags as fl
from tonebench.analysis.attenuation import analyzer_im3_dbm, implied_mixer_toi_dbm, residual_ip3_at_atten_dbm
from tonebench.analysis.fit import (
    GAIN_TOLERANCE_DB,
    IM3_OVER_NOISE_MIN_DB,
    SweepResult,
    fit_sweep,
    high_order_top,
    noise_corrected_dbm,
)
from tonebench.analysis.flags import Flag
from tonebench.analysis.intercepts import point_intercepts
from tonebench.analysis.phasor import intercept_error_db
from tonebench.analysis.second_order import SecondOrderResult, fit_second_order
from tonebench.analysis.uncertainty import combine, scatter_half_width_db
from tonebench.errors import InputError

# Default relative level accuracy of the analyzer between a tone and an IM3 reading 40..100 dB
# below it (display scale fidelity and reference-level switching; a typical datasheet figure
# for a swept analyzer, from memory). Configurable per bench.
DEFAULT_LEVEL_ACCURACY_DB = 0.2
ANALYZER_MADE = "with the analyzer's own IM3 within 20 dB"
HIGH_ORDER = "biased by higher-order terms"

_REQUIRED = ("tone_dbm", "pin1_dbm", "pin2_dbm", "pout_f1_dbm", "pout_f2_dbm", "im3_lower_dbm",
             "im3_upper_dbm", "noise_lower_dbm", "noise_upper_dbm", "overload")


@dataclass(frozen=True)
class SweepData:
    """One sweep's readings (arrays, one value per point; optional ones None or NaN where not read)."""

    tone_dbm: object
    pin1_dbm: object
    pin2_dbm: object
    pout_f1_dbm: object
    pout_f2_dbm: object
    im3_lower_dbm: object
    im3_upper_dbm: object
    noise_lower_dbm: object
    noise_upper_dbm: object
    overload: object
    atten_db: object = None
    raw_f1_dbm: object = None
    raw_f2_dbm: object = None
    raw_lower_dbm: object = None
    raw_upper_dbm: object = None
    raw_noise_lower_dbm: object = None
    raw_noise_upper_dbm: object = None
    step_atten_db: object = None
    raw_lower_step_dbm: object = None
    raw_upper_step_dbm: object = None
    raw_noise_lower_step_dbm: object = None
    raw_noise_upper_step_dbm: object = None
    im2_diff_dbm: object = None
    im2_sum_dbm: object = None
    noise_diff_dbm: object = None
    noise_sum_dbm: object = None

    def arrays(self) -> dict[str, np.ndarray]:
        """Every field as a float array (overload as bool); missing optional fields as NaN."""
        n = np.asarray(self.tone_dbm, dtype=float).size
        out: dict[str, np.ndarray] = {}
        for f in fields(self):
            value = getattr(self, f.name)
            if value is None:
                arr = np.full(n, np.nan)
            else:
                arr = np.asarray(value, dtype=bool if f.name == "overload" else float)
                if arr.ndim == 0:
                    arr = np.full(n, arr)
            if arr.shape != (n,):
                raise InputError(f"sweep data: {f.name} has shape {arr.shape}; every array must be 1-D "
                                 f"with one value per point ({n}, like tone_dbm)")
            out[f.name] = arr
        return out


@dataclass(frozen=True)
class AnalysisSettings:
    """What the analysis knows about the test system (dB, dBm); None where unknown.

    mixer_toi_dbm, max_mixer_dbm: the analyzer's (dialect [performance]/[limits] or bench file);
    system_ip3_dbm: the system's residual intercept at the DUT input plane (calibration set),
    charged whole to the sources at every attenuation when residual_atten_db is None;
    system_note: why there is none, said when the source-intermod check is skipped.
    With residual_atten_db given, the residual is charged per point at the point's attenuation:
    source_ip3_dbm (the sources' share; a bound, the share at most this large, when
    source_ip3_is_bound) plus analyzer_ip3_dbm (the analyzer's share at residual_atten_db, falling
    with more attenuation); a share None is absent.
    """

    level_accuracy_db: float = DEFAULT_LEVEL_ACCURACY_DB
    mixer_toi_dbm: float | None = None
    max_mixer_dbm: float | None = None
    system_ip3_dbm: float | None = None
    system_note: str | None = None
    source_ip3_dbm: float | None = None
    source_ip3_is_bound: bool = False
    analyzer_ip3_dbm: float | None = None
    residual_atten_db: float | None = None


@dataclass(frozen=True)
class SweepAssessment:
    """Everything known about one sweep. Bound and lower bound in dB and dBm.

    iip3_bound_db: IIP3 lies within +/- this of fit.iip3_dbm (None without an intercept, or when
    a system product may be as large as the reading); iip3_at_least_dbm: with the intercept
    refused for noise, the IIP3 the readings still prove; notes: checks that could not be made.
    """

    fit: SweepResult
    point_flags: list[list[Flag]]
    result_flags: list[Flag]
    iip3_bound_db: float | None
    bound_terms_db: dict[str, float]
    iip3_at_least_dbm: float | None
    second_order: SecondOrderResult | None
    effective_mixer_toi_dbm: float | None
    step_change_db: np.ndarray  # per point, the larger |change| of the two products (NaN: no check)
    notes: list[str]

    @property
    def flagged_mask(self) -> np.ndarray:
        return np.array([bool(f) for f in self.point_flags], dtype=bool)


def _mean_pair(a, b) -> np.ndarray:
    return (np.asarray(a, dtype=float) + np.asarray(b, dtype=float)) / 2.0


def _fmt(value: float) -> str:
    return "inf" if not math.isfinite(value) else f"{value:.2f}"


def compression_shift_db(point_iip3_dbm, compression_db, valid) -> float:
    """How much the onset of compression may bias the fixed-slope intercept (dB).

    The valid region admits points compressed by up to 0.3 dB; near compression a device's IM3
    departs from slope 3 by an amount its gain alone does not tell (a pure cubic reads low by
    c/2, a stage that saturates early by several times c). So the term is the larger of the
    mean compression c of the fitted points and the fit's shift when the more compressed half of
    them is left out (the sensitivity of the result to its region).
    """
    idx = np.flatnonzero(valid)
    if idx.size == 0:
        return 0.0
    comp = np.asarray(compression_db, dtype=float)
    mean_c = float(np.mean(comp[idx]))
    if idx.size < 4:
        return mean_c
    ordered = idx[np.argsort(comp[idx], kind="stable")]
    keep = ordered[: (idx.size + 1) // 2]
    values = np.asarray(point_iip3_dbm, dtype=float)
    shift = abs(float(np.mean(values[idx]) - np.mean(values[keep])))
    return max(shift, mean_c)


def _residual_words(settings: AnalysisSettings, ip3_dbm: float, atten_db: float) -> str:
    if settings.residual_atten_db is None:
        return f"intercept {ip3_dbm:.1f} dBm at the DUT input"
    source = ("none resolved" if settings.source_ip3_dbm is None else
              f"{'at least ' if settings.source_ip3_is_bound else ''}{settings.source_ip3_dbm:.1f} dBm")
    where = "" if not math.isfinite(atten_db) else f" at {atten_db:g} dB attenuation"
    return f"intercept {ip3_dbm:.1f} dBm at the DUT input{where}; sources' share {source}"


def source_check(a, settings: AnalysisSettings, lower_c, upper_c, gain_db, add,
                 notes) -> tuple[np.ndarray, np.ndarray]:
    """The sources' residual IM3 carried through the DUT gain, per point: (IIP3 error, flagged).

    The residual is the one that applies at the attenuation each point was measured with
    (AnalysisSettings): a share the thru could not resolve is charged at its bound.
    """
    n = lower_c.size
    if settings.system_ip3_dbm is None:
        notes.append("source intermod not checked: " + (settings.system_note or "no system residual known"))
        return np.zeros(n), np.zeros(n, bool)
    if settings.residual_atten_db is None:
        ip3 = np.full(n, float(settings.system_ip3_dbm))
    else:
        ip3 = residual_ip3_at_atten_dbm(settings.source_ip3_dbm, settings.analyzer_ip3_dbm,
                                        settings.residual_atten_db, a["atten_db"])
    residual = {"lower": 2.0 * a["pin1_dbm"] + a["pin2_dbm"] - 2.0 * ip3 + gain_db,
                "upper": a["pin1_dbm"] + 2.0 * a["pin2_dbm"] - 2.0 * ip3 + gain_db}
    ratio = {"lower": lower_c - residual["lower"], "upper": upper_c - residual["upper"]}
    with np.errstate(invalid="ignore"):
        source_err = _mean_pair(intercept_error_db(ratio["lower"]), intercept_error_db(ratio["upper"]))
        source_flag = np.fmin(ratio["lower"], ratio["upper"]) < fl.SYSTEM_MARGIN_DB
    add(source_flag, lambda i: Flag(
        fl.SOURCE_INTERMOD_LIMITED, None,
        f"IM3 only {min(ratio['lower'][i], ratio['upper'][i]):.1f} dB over the system's residual "
        f"({_residual_words(settings, ip3[i], a['atten_db'][i])}) carried through the {gain_db[i]:.1f} dB gain; "
        f"needs {fl.SYSTEM_MARGIN_DB:g} dB",
        float(source_err[i]) if np.isfinite(source_err[i]) else None))
    return source_err, source_flag


def fit_region(a: dict[str, np.ndarray], over, exclude: dict[str, np.ndarray],
               noise_err) -> tuple[SweepResult, np.ndarray]:
    """The fit over the valid region, its top trimmed where higher-order terms bias the IM3.

    Returns the fit and the points left out for that (fit.high_order_top; each point's scatter is
    taken as its noise error).
    """
    def fit(extra: dict[str, np.ndarray]) -> SweepResult:
        return fit_sweep(a["tone_dbm"], a["pin1_dbm"], a["pin2_dbm"], a["pout_f1_dbm"], a["pout_f2_dbm"],
                         a["im3_lower_dbm"], a["im3_upper_dbm"], a["noise_lower_dbm"], a["noise_upper_dbm"],
                         over, exclude={**exclude, **extra})

    first = fit({})
    pin_mean = _mean_pair(a["pin1_dbm"], a["pin2_dbm"])
    trimmed = high_order_top(pin_mean, first.point_iip3_dbm, noise_err, first.valid_mask)
    if first.iip3_dbm is None or not trimmed.any():
        return first, np.zeros_like(trimmed)
    return fit({HIGH_ORDER: trimmed}), trimmed


def assess_sweep(data: SweepData, settings: AnalysisSettings = AnalysisSettings()) -> SweepAssessment:
    """Flag every point, fit the valid region, bound the intercept (see the module docstrings)."""
    a = data.arrays()
    n = a["tone_dbm"].size
    point_flags: list[list[Flag]] = [[] for _ in range(n)]
    notes: list[str] = []

    def add(mask, make) -> None:
        for i in np.flatnonzero(mask):
            point_flags[i].append(make(int(i)))

    # --- readings over their noise --------------------------------------------------------------
    lower_c, _ = noise_corrected_dbm(a["im3_lower_dbm"], a["noise_lower_dbm"])
    upper_c, _ = noise_corrected_dbm(a["im3_upper_dbm"], a["noise_upper_dbm"])
    snr_lower = fl.snr_db(a["im3_lower_dbm"], a["noise_lower_dbm"])
    snr_upper = fl.snr_db(a["im3_upper_dbm"], a["noise_upper_dbm"])
    pts = point_intercepts(a["pin1_dbm"], a["pin2_dbm"], a["pout_f1_dbm"], a["pout_f2_dbm"], lower_c, upper_c)
    with np.errstate(invalid="ignore"):
        noisy = np.fmin(snr_lower, snr_upper) < IM3_OVER_NOISE_MIN_DB
    noise_err = _mean_pair(fl.noise_error_db(snr_lower), fl.noise_error_db(snr_upper))
    add(noisy, lambda i: Flag(
        fl.ANALYZER_LIMITED, fl.NOISE,
        f"IM3 {_fmt(snr_lower[i])} dB (lower) and {_fmt(snr_upper[i])} dB (upper) over the noise floor; "
        f"needs {IM3_OVER_NOISE_MIN_DB:g} dB" + ("; below 3 dB only an upper bound" if not np.isfinite(noise_err[i]) else ""),
        float(noise_err[i]) if np.isfinite(noise_err[i]) else None))

    # --- overload: reported by the analyzer, or the mixer level above its limit ------------------
    over = a["overload"].copy()
    raw_total_dbm = 10.0 * np.log10(10.0 ** (a["raw_f1_dbm"] / 10.0) + 10.0 ** (a["raw_f2_dbm"] / 10.0))
    mixer_dbm = raw_total_dbm - a["atten_db"]
    mixer_over = np.zeros(n, bool)
    if settings.max_mixer_dbm is not None:
        with np.errstate(invalid="ignore"):
            mixer_over = mixer_dbm > settings.max_mixer_dbm
    add(over | mixer_over, lambda i: Flag(
        fl.ANALYZER_LIMITED, fl.OVERLOAD,
        "the analyzer reported overload" if over[i] else
        f"mixer level {mixer_dbm[i]:.1f} dBm above the analyzer's {settings.max_mixer_dbm:g} dBm limit", None))
    over = over | mixer_over

    # --- the analyzer's own IM3: the attenuation-step check and the prediction -------------------
    judged = {
        side: fl.judge_step(a[f"raw_{side}_dbm"], a[f"raw_noise_{side}_dbm"], a[f"raw_{side}_step_dbm"],
                            a[f"raw_noise_{side}_step_dbm"], a["step_atten_db"])
        for side in ("lower", "upper")
    }
    # The upper product is the lower one's form with the tones swapped (P1 + 2 P2).
    tones = {"lower": (a["raw_f1_dbm"], a["raw_f2_dbm"]), "upper": (a["raw_f2_dbm"], a["raw_f1_dbm"])}
    implied = np.concatenate([
        np.where(judged[s].analyzer_made, implied_mixer_toi_dbm(*tones[s], a["atten_db"], judged[s].analyzer_dbm), np.nan)
        for s in ("lower", "upper")])
    toi_step = float(np.nanmin(implied)) if np.isfinite(implied).any() else None
    candidates = [t for t in (settings.mixer_toi_dbm, toi_step) if t is not None]
    toi_eff = min(candidates) if candidates else None
    raw_corrected = {s: noise_corrected_dbm(a[f"raw_{s}_dbm"], a[f"raw_noise_{s}_dbm"])[0] for s in ("lower", "upper")}
    analyzer_err = {}
    analyzer_flag = np.zeros(n, bool)
    analyzer_ratio = {}
    for s in ("lower", "upper"):
        predicted = (analyzer_im3_dbm(*tones[s], a["atten_db"], toi_eff)[0] if toi_eff is not None
                     else np.full(n, np.nan))
        estimate = np.fmax(predicted, judged[s].analyzer_dbm)
        ratio = raw_corrected[s] - estimate
        analyzer_ratio[s] = ratio
        analyzer_err[s] = np.where(np.isfinite(ratio), intercept_error_db(ratio), 0.0)
        with np.errstate(invalid="ignore"):
            # Judged by prediction only where the reading is the product, not the noise floor.
            by_prediction = ~judged[s].conclusive & ~noisy & (ratio < fl.SYSTEM_MARGIN_DB)
        analyzer_flag |= judged[s].analyzer_made | by_prediction
    analyzer_point_err = _mean_pair(analyzer_err["lower"], analyzer_err["upper"])
    step_change = np.fmax(np.abs(judged["lower"].change_db), np.abs(judged["upper"].change_db))
    step_change = np.where(judged["lower"].conclusive | judged["upper"].conclusive, step_change, np.nan)

    def distortion_flag(i: int) -> Flag:
        made = [s for s in ("lower", "upper") if judged[s].analyzer_made[i]]
        if made:
            detail = "; ".join(
                f"IM3 {s} moved {judged[s].change_db[i]:+.2f} dB with {a['step_atten_db'][i]:g} dB more "
                f"attenuation (a real product stays within {fl.STEP_CHANGE_LIMIT_DB:g} dB; beyond "
                f"{judged[s].limit_db[i]:.2f} dB noise cannot explain it)" for s in made)
        else:
            ratio = float(np.nanmin([analyzer_ratio["lower"][i], analyzer_ratio["upper"][i]]))
            detail = (f"the analyzer's own IM3 is predicted {ratio:.1f} dB under the reading "
                      f"(mixer TOI {toi_eff:.1f} dBm, attenuation {a['atten_db'][i]:g} dB); "
                      f"needs {fl.SYSTEM_MARGIN_DB:g} dB")
        err = float(analyzer_point_err[i])
        return Flag(fl.ANALYZER_LIMITED, fl.DISTORTION, detail, err if math.isfinite(err) else None)

    add(analyzer_flag, distortion_flag)
    if toi_eff is None:
        notes.append("analyzer distortion not predicted: no mixer TOI for the analyzer")
    elif not np.isfinite(a["raw_f1_dbm"]).any() or not np.isfinite(a["atten_db"]).any():
        notes.append("analyzer distortion not predicted: no raw tone readings or attenuation")
    if not (judged["lower"].conclusive | judged["upper"].conclusive).any():
        notes.append("no conclusive attenuation-step check in this sweep")

    # --- the sources' residual IM3 carried through the DUT gain ---------------------------------
    source_err, source_flag = source_check(a, settings, lower_c, upper_c, pts.gain_db, add, notes)

    # --- tone imbalance -------------------------------------------------------------------------
    imbalance = np.abs(a["pin1_dbm"] - a["pin2_dbm"])
    with np.errstate(invalid="ignore"):
        unbalanced = imbalance > fl.TONE_IMBALANCE_LIMIT_DB
    add(unbalanced, lambda i: Flag(
        fl.TONE_IMBALANCE, None,
        f"tones {imbalance[i]:.2f} dB apart at the DUT input (limit {fl.TONE_IMBALANCE_LIMIT_DB:g} dB); "
        "the unequal-tone forms correct a memoryless device, the error shown is what they correct",
        float(imbalance[i] / 4.0)))

    # --- the fit ---------------------------------------------------------------------------------
    fit, high_order = fit_region(a, over, {ANALYZER_MADE: analyzer_flag}, noise_err)
    add(high_order, lambda i: Flag(
        fl.SLOPE, None,
        f"intercept {fit.point_iip3_dbm[i] - fit.iip3_dbm:+.2f} dB off the fitted region's: the local IM3 slope "
        "departs from 3 (higher-order terms); left out of the fit", None))
    gss = fit.gain_db
    compression = np.zeros(n)
    if gss is not None:
        deviation = pts.gain_db - gss
        compression = np.maximum(0.0, -deviation)
        with np.errstate(invalid="ignore"):
            # An overloaded analyzer compresses its own readings: that point says nothing of the DUT.
            outside = (np.abs(deviation) > GAIN_TOLERANCE_DB) & ~over
        add(outside, lambda i: Flag(
            fl.COMPRESSED, None,
            f"gain {abs(deviation[i]):.2f} dB {'below' if deviation[i] < 0 else 'above'} the small-signal "
            f"{gss:.2f} dB (limit {GAIN_TOLERANCE_DB:g} dB)" + ("" if deviation[i] < 0 else ": expansion"),
            float(abs(deviation[i]) / 2.0)))
    valid = fit.valid_mask

    # --- the bound -------------------------------------------------------------------------------
    terms: dict[str, float] = {}
    bound = None
    if fit.iip3_dbm is not None:
        nv = int(valid.sum())
        terms = {
            "level": settings.level_accuracy_db / 2.0,
            "source": float(np.mean(source_err[valid])),
            "analyzer": float(np.mean(analyzer_point_err[valid])),
            "compression": compression_shift_db(fit.point_iip3_dbm, compression, valid),
            "scatter": scatter_half_width_db(fit.point_iip3_dbm[valid]),
            "noise": float(math.sqrt(float(np.sum(noise_err[valid] ** 2))) / nv),
        }
        half_width = combine(terms).half_width_db
        bound = half_width if math.isfinite(half_width) else None

    # --- a lower bound on IIP3 when noise refused the intercept ------------------------------
    at_least = None
    if fit.iip3_dbm is None and noisy.any():
        raw_pts = point_intercepts(a["pin1_dbm"], a["pin2_dbm"], a["pout_f1_dbm"], a["pout_f2_dbm"],
                                   a["im3_lower_dbm"], a["im3_upper_dbm"])
        # A reading with noise in it only overstates the product, so its intercept understates.
        lb = _mean_pair(raw_pts.iip3_lower_dbm, raw_pts.iip3_upper_dbm)
        usable = np.isfinite(lb) & ~over & ~analyzer_flag
        if gss is not None:
            usable &= np.abs(pts.gain_db - gss) <= GAIN_TOLERANCE_DB
        if usable.any():
            at_least = float(lb[usable].max() - settings.level_accuracy_db / 2.0)

    # --- result flags ----------------------------------------------------------------------------
    result_flags: list[Flag] = []
    refused = fit.iip3_dbm is None

    def count(mask) -> str:
        return f"{int(np.sum(mask))} of {n} points"

    step_made = judged["lower"].analyzer_made | judged["upper"].analyzer_made
    # Shown on the result when the step check proved it on the bench, or when it cost the intercept.
    if step_made.any() or (refused and analyzer_flag.any()):
        err = terms.get("analyzer")
        result_flags.append(Flag(
            fl.ANALYZER_LIMITED, fl.DISTORTION,
            f"{count(analyzer_flag)} carry the analyzer's own IM3 and are left out; mixer TOI "
            f"{toi_eff:.1f} dBm" + (f" (the step check shows it; {settings.mixer_toi_dbm:g} dBm declared)"
                                    if toi_step is not None and (settings.mixer_toi_dbm is None or toi_step < settings.mixer_toi_dbm)
                                    else "") + "; raise the analyzer attenuation",
            err))
    if refused:
        for mask, flag, cause, why in (
            (noisy, fl.ANALYZER_LIMITED, fl.NOISE, "IM3 within 10 dB of the noise floor"),
            (over, fl.ANALYZER_LIMITED, fl.OVERLOAD, "overloaded"),
        ):
            if mask.any():
                detail = f"intercept refused: {count(mask)} {why}"
                if cause == fl.NOISE and at_least is not None:
                    detail += f"; the readings still prove IIP3 >= {at_least:.2f} dBm"
                result_flags.append(Flag(flag, cause, detail, None))
        compressed = (compression > GAIN_TOLERANCE_DB) & ~over
        if compressed.any():
            result_flags.append(Flag(fl.COMPRESSED, None, f"intercept refused: {count(compressed)} compressed", None))
    scope = valid if not refused else np.ones(n, bool)
    if (source_flag & scope).any():
        err = terms.get("source")
        result_flags.append(Flag(
            fl.SOURCE_INTERMOD_LIMITED, None,
            f"{count(source_flag & scope)} within {fl.SYSTEM_MARGIN_DB:g} dB of the system's residual IM3 "
            f"({_residual_words(settings, settings.system_ip3_dbm, settings.residual_atten_db or math.nan)}); a better combiner or isolator helps",
            err if err is None or math.isfinite(err) else None))
    if (unbalanced & scope).any():
        result_flags.append(Flag(fl.TONE_IMBALANCE, None,
                                 f"{count(unbalanced & scope)} with the tones more than "
                                 f"{fl.TONE_IMBALANCE_LIMIT_DB:g} dB apart",
                                 float(np.max(imbalance[unbalanced & scope]) / 4.0)))
    slopes = [s for s in (fit.slope_im3_lower, fit.slope_im3_upper) if s is not None]
    if slopes and any(abs(s - 3.0) > fl.SLOPE_TOLERANCE for s in slopes):
        err = None if fit.iip3_free_dbm is None else abs(fit.iip3_free_dbm - fit.iip3_dbm)
        result_flags.append(Flag(
            fl.SLOPE, None,
            f"free IM3 slope {fit.slope_im3_lower:.2f} (lower), {fit.slope_im3_upper:.2f} (upper); "
            f"expected 3 +/- {fl.SLOPE_TOLERANCE:g} in the fitted region",
            err))

    # --- second order ----------------------------------------------------------------------------
    second = None
    if np.isfinite(a["im2_diff_dbm"]).any() or np.isfinite(a["im2_sum_dbm"]).any():
        usable = np.isfinite(pts.gain_db) & ~over
        if gss is not None:
            usable &= np.abs(pts.gain_db - gss) <= GAIN_TOLERANCE_DB
        second = fit_second_order(
            a["pin1_dbm"], a["pin2_dbm"], pts.gain_db, usable,
            {"diff": (a["im2_diff_dbm"], a["noise_diff_dbm"]), "sum": (a["im2_sum_dbm"], a["noise_sum_dbm"])},
            settings.level_accuracy_db, compression, gss)

    return SweepAssessment(
        fit=fit, point_flags=point_flags, result_flags=result_flags, iip3_bound_db=bound,
        bound_terms_db=terms, iip3_at_least_dbm=at_least, second_order=second,
        effective_mixer_toi_dbm=toi_eff, step_change_db=step_change, notes=notes)
