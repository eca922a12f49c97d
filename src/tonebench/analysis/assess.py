"""One sweep from readings to a trustworthy result: flags per point and per result, the valid
region, the fits, the IIP3 bound, and IIP2 when second-order products were read.

Pure numpy over 1-D arrays, one value per point (design sections 3 and 4). Raw readings (raw_*)
are at the analyzer input; the others are DUT-referred, like the store's Point columns.
assess_sweep runs the named steps in order: noise, overload, distortion and source intermod
(point_checks, system_checks), the fit over the valid region and compression (region), the
bound (bound), the result flags (result_flags) and second order (second_order).
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

from tonebench.analysis.bound import bound_terms_db, iip3_at_least_dbm, iip3_bound_db
from tonebench.analysis.detectors import detector_flags, log_rms_notes
from tonebench.analysis.flags import Flag, StepJudgement
from tonebench.analysis.phase_noise import check_phase_noise, phase_noise_result
from tonebench.analysis.point_checks import (
    NoiseCheck,
    PointFlags,
    check_imbalance,
    check_noise,
    check_overload,
    mixer_level_dbm,
    noise_values,
    sliced,
)
from tonebench.analysis.region import (
    CompressionCheck,
    RegionFit,
    check_compression,
    fit_valid_region,
    high_order_top,
    region_fit,
)
from tonebench.analysis.result_flags import (
    distortion_result,
    imbalance_result,
    refusal_results,
    slope_result,
    source_result,
)
from tonebench.analysis.second_order import SecondOrderResult, sweep_second_order
from tonebench.analysis.second_order_checks import analyzer_made_im2
from tonebench.analysis.second_order_checks import note_of as im2_note_of
from tonebench.analysis.segment_bound import bound_terms_segments
from tonebench.analysis.segment_checks import distortion_checks
from tonebench.analysis.segment_fit import fit_segments, segment_ids
from tonebench.analysis.settings import DEFAULT_LEVEL_ACCURACY_DB, AnalysisSettings
from tonebench.analysis.sweep_fit import (
    FitPoints,
    SweepResult,
    fit_points,
)
from tonebench.analysis.system_checks import (
    DistortionCheck,
    check_distortion,
    check_source_intermod,
    judge_steps,
    raw_products_dbm,
)
from tonebench.errors import InputError

__all__ = ["DEFAULT_LEVEL_ACCURACY_DB", "AnalysisSettings", "SweepAssessment", "SweepData", "assess_sweep",
           "assess_sweeps"]


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
    raw_diff_dbm: object = None  # the IM2 readings as read (analyzer input), for second_order_checks
    raw_sum_dbm: object = None
    noise_peak_detected: object = None  # 1.0 where the noise was read with a peak detector (analysis/detectors.py)
    noise_log_rms: object = None  # 1.0 where it was read with an rms detector and log averaging
    rbw_hz: object = None  # the products' RBW (phase-noise check)

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



def merged_point_flags(n: int, steps: tuple[PointFlags, ...]) -> list[list[Flag]]:
    """Each point's flags, in the order of the steps that raised them."""
    out: list[list[Flag]] = [[] for _ in range(n)]
    for step in steps:
        for i, flag in step:
            out[i].append(flag)
    return out


@dataclass(frozen=True)
class _PointSteps:
    """The steps that go point by point, for any number of points (one sweep's or many sweeps'):
    noise values, per-point intercepts, mixer level and the attenuation-step check."""

    noise: NoiseCheck
    fit: FitPoints  # its IM3 are the noise values', its intercepts the points' own
    mixer_dbm: np.ndarray
    judged: dict[str, StepJudgement]
    raw_products_dbm: dict[str, np.ndarray]  # system_checks.raw_products_dbm

    @classmethod
    def of(cls, a: dict[str, np.ndarray]) -> _PointSteps:
        noise = noise_values(a)
        # The fit's point-by-point values (sweep_fit.fit_points), from the same noise correction.
        fit = fit_points(a, noise.lower_dbm, noise.upper_dbm)
        return cls(noise, fit, mixer_level_dbm(a["raw_f1_dbm"], a["raw_f2_dbm"], a["atten_db"]), judge_steps(a),
                   raw_products_dbm(a))

    def part(self, points: slice) -> _PointSteps:
        return _PointSteps(sliced(self.noise, points), self.fit.part(points), self.mixer_dbm[points],
                           {side: sliced(j, points) for side, j in self.judged.items()},
                           {side: v[points] for side, v in self.raw_products_dbm.items()})


def assess_sweep(data: SweepData, settings: AnalysisSettings = AnalysisSettings()) -> SweepAssessment:
    """Flag every point, fit the valid region, bound the intercept (see the module docstrings)."""
    a = data.arrays()
    return _assess(a, settings, _PointSteps.of(a))


def assess_sweeps(data: SweepData, sweeps: list[slice], settings: list[AnalysisSettings]) -> list[SweepAssessment]:
    """assess_sweep for many sweeps whose points `data` holds back to back (sweeps: each one's
    slice of them, with its settings). The point-by-point steps run once over all the points
    (numpy over thousands of values instead of a few dozen calls per sweep), and so do the
    analyzer-distortion check, the fit of the valid region and the bound's terms (segment_checks,
    segment_fit, segment_bound: segment reductions over all the sweeps); the other checks run
    sweep by sweep, and flags are worded only where raised. Each result is what assess_sweep gives that sweep alone, but for sums
    taken in another order (means and slopes within about 1e-15 relative)."""
    if len(sweeps) != len(settings):
        raise InputError(f"assess_sweeps: {len(sweeps)} sweeps but {len(settings)} settings; one each")
    a = data.arrays()
    steps = _PointSteps.of(a)
    parts = [({name: arr[part] for name, arr in a.items()}, sweep_settings, steps.part(part))
             for part, sweep_settings in zip(sweeps, settings)]
    starts = _back_to_back_starts(sweeps, a["tone_dbm"].size)
    if starts is None:  # not one run of sweeps back to back: sweep by sweep
        checks = [_Checks.of(*p) for p in parts]
        regions = [fit_valid_region(p[0], c.over, c.analyzer_flag, c.noise.error_db, p[2].fit)
                   for p, c in zip(parts, checks)]
    else:
        distortions = distortion_checks(a, steps.judged, steps.raw_products_dbm, steps.noise.noisy, starts,
                                        [s.mixer_toi_dbm for s in settings], [p[2].judged for p in parts])
        checks = [_Checks.of(*p, distortion) for p, distortion in zip(parts, distortions)]
        regions = _batch_regions(a, steps.fit, starts, parts, checks)
        compressions = [check_compression(p[2].fit.pts.gain_db, r.fit.gain_db, c.over)
                        for p, c, r in zip(parts, checks, regions)]
        terms = _batch_terms(starts, steps, settings, checks, regions, compressions)
        return [_finish(*p, c, r, comp, t) for p, c, r, comp, t in zip(parts, checks, regions, compressions, terms)]
    return [_finish(*p, c, r) for p, c, r in zip(parts, checks, regions)]


def _batch_terms(starts: np.ndarray, steps: _PointSteps, settings: list[AnalysisSettings], checks: list[_Checks],
                 regions: list[RegionFit], compressions: list[CompressionCheck]) -> list[dict[str, float]]:
    """bound_terms_db of every sweep as segment reductions (segment_bound)."""
    n_points = steps.mixer_dbm.size
    fits = [r.fit for r in regions]
    return bound_terms_segments(
        segment_ids(starts, n_points), starts.size, np.array([f.iip3_dbm is not None for f in fits]),
        np.concatenate([f.valid_mask for f in fits]), np.concatenate([f.point_iip3_dbm for f in fits]),
        [s.level_accuracy_db for s in settings], np.concatenate([c.source.error_db for c in checks]),
        np.concatenate([c.distortion.share.error_db for c in checks]),
        np.concatenate([c.compression_db for c in compressions]), steps.noise.error_db)


def _back_to_back_starts(sweeps: list[slice], n_points: int) -> np.ndarray | None:
    """Each sweep's first point when the slices cover the points in order, none empty (else None)."""
    if not sweeps:
        return None
    stop = 0
    for part in sweeps:
        if part.step not in (None, 1) or part.start != stop or part.stop is None or part.stop <= stop:
            return None
        stop = part.stop
    return np.array([part.start for part in sweeps], np.intp) if stop == n_points else None


def _batch_regions(a: dict[str, np.ndarray], points: FitPoints, starts: np.ndarray, parts, checks) -> list[RegionFit]:
    """fit_valid_region of every sweep: the fits and refits after trimming as segment fits over
    the batch; a refused fit (its reason is worded sweep by sweep) through fit_valid_region's own steps."""
    over = np.concatenate([c.over for c in checks])
    analyzer = np.concatenate([np.asarray(c.analyzer_flag, bool) for c in checks])
    firsts = fit_segments(a, points, over, analyzer, starts)
    trims: list[np.ndarray | None] = []
    for p, c, first in zip(parts, checks, firsts):
        if first is None:
            trims.append(None)
            continue
        trimmed = high_order_top(p[2].fit.pin_mean_dbm, first.point_iip3_dbm, c.noise.error_db, first.valid_mask)
        trims.append(trimmed if trimmed.any() else None)
    refits: list[SweepResult | None] = [None] * len(parts)
    if any(t is not None for t in trims):
        high = np.concatenate([np.zeros(c.over.size, bool) if t is None else t for c, t in zip(checks, trims)])
        refits = fit_segments(a, points, over, analyzer | high, starts)
    regions = []
    for p, c, first, trimmed, refit in zip(parts, checks, firsts, trims, refits):
        if first is None or (trimmed is not None and refit is None):
            regions.append(fit_valid_region(p[0], c.over, c.analyzer_flag, c.noise.error_db, p[2].fit))
        elif trimmed is None:
            regions.append(region_fit(first, np.zeros(c.over.size, bool)))
        else:
            regions.append(region_fit(refit, trimmed))
    return regions


@dataclass(frozen=True)
class _Checks:
    """The checks before the fit of the valid region (their results feed it and what follows)."""

    noise: object
    overload: object
    distortion: object
    source: object
    imbalance: object
    phase: object  # the analyzer's phase noise at close spacing (analysis/phase_noise.py)

    @property
    def over(self) -> np.ndarray:
        return self.overload.over

    @property
    def analyzer_flag(self) -> np.ndarray:
        return self.distortion.share.flagged | self.phase.flagged

    @classmethod
    def of(cls, a: dict[str, np.ndarray], settings: AnalysisSettings, steps: _PointSteps,
           distortion: DistortionCheck | None = None) -> _Checks:
        """The checks of one sweep (distortion: check_distortion's when worked out already)."""
        noise = check_noise(a, steps.noise)
        overload = check_overload(a, settings.max_mixer_dbm, steps.mixer_dbm)
        if distortion is None:
            distortion = check_distortion(a, settings.mixer_toi_dbm, noise.noisy, steps.judged, steps.raw_products_dbm)
        source = check_source_intermod(a, settings, noise.lower_dbm, noise.upper_dbm, steps.fit.pts.gain_db)
        return cls(noise, overload, distortion, source, check_imbalance(a), check_phase_noise(a, settings))


def _assess(a: dict[str, np.ndarray], settings: AnalysisSettings, steps: _PointSteps) -> SweepAssessment:
    checks = _Checks.of(a, settings, steps)
    region = fit_valid_region(a, checks.over, checks.analyzer_flag, checks.noise.error_db, steps.fit)
    return _finish(a, settings, steps, checks, region)


def _finish(a: dict[str, np.ndarray], settings: AnalysisSettings, steps: _PointSteps, checks: _Checks,
            region: RegionFit, compression: CompressionCheck | None = None,
            terms: dict[str, float] | None = None) -> SweepAssessment:
    """The steps after the fit (compression, terms: their results when worked out already)."""
    noise, overload, distortion = checks.noise, checks.overload, checks.distortion
    source, imbalance, phase = checks.source, checks.imbalance, checks.phase
    pts = steps.fit.pts
    over = checks.over
    analyzer_flag = checks.analyzer_flag
    fit = region.fit
    if compression is None:
        compression = check_compression(pts.gain_db, fit.gain_db, over)
    if terms is None:
        terms = bound_terms_db(fit, settings.level_accuracy_db, source.error_db, distortion.share.error_db,
                               compression.compression_db, noise.error_db)
    refused = fit.iip3_dbm is None
    at_least = None
    if refused and noise.noisy.any():
        at_least = iip3_at_least_dbm(a, over | analyzer_flag, pts.gain_db, fit.gain_db, settings.level_accuracy_db)

    scope = fit.valid_mask if not refused else np.ones(over.size, bool)
    result_flags = [
        *distortion_result(distortion, settings.mixer_toi_dbm, refused, terms.get("analyzer")),
        *(refusal_results(noise.noisy, over, compression.compression_db, at_least) if refused else []),
        *source_result(source, settings, scope, terms.get("source")),
        *imbalance_result(imbalance, scope),
        *slope_result(fit),
        *phase_noise_result(phase, settings, over, fit.valid_mask if not refused else np.zeros(over.size, bool)),
    ]
    point_flags = merged_point_flags(over.size, (noise.flags, phase.flags, overload.flags, distortion.flags, source.flags,
                                                 imbalance.flags, region.flags, compression.flags,
                                                 detector_flags(a, noise.noisy)))
    analyzer_im2 = analyzer_made_im2(a, settings.mixer_shi_dbm)
    second = sweep_second_order(a, pts.gain_db, over, fit.gain_db, settings.level_accuracy_db,
                                compression.compression_db, analyzer_im2)
    return SweepAssessment(
        fit=fit, point_flags=point_flags, result_flags=result_flags, iip3_bound_db=iip3_bound_db(terms),
        bound_terms_db=terms, iip3_at_least_dbm=at_least, second_order=second,
        effective_mixer_toi_dbm=distortion.toi_dbm, step_change_db=distortion.step_change_db,
        notes=[*distortion.notes, *source.notes, *im2_note_of(analyzer_im2, settings.mixer_shi_dbm),
               *log_rms_notes(a)])
