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
from tonebench.analysis.detectors import detector_flags
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
from tonebench.analysis.region import check_compression, fit_valid_region
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
from tonebench.analysis.settings import DEFAULT_LEVEL_ACCURACY_DB, AnalysisSettings
from tonebench.analysis.sweep_fit import FitPoints, SweepResult, fit_points
from tonebench.analysis.system_checks import (
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
    (numpy over thousands of values instead of a few dozen calls per sweep); what reduces over
    a sweep runs sweep by sweep. Each result is what assess_sweep gives that sweep alone."""
    if len(sweeps) != len(settings):
        raise InputError(f"assess_sweeps: {len(sweeps)} sweeps but {len(settings)} settings; one each")
    a = data.arrays()
    steps = _PointSteps.of(a)
    return [_assess({name: arr[part] for name, arr in a.items()}, sweep_settings, steps.part(part))
            for part, sweep_settings in zip(sweeps, settings)]


def _assess(a: dict[str, np.ndarray], settings: AnalysisSettings, steps: _PointSteps) -> SweepAssessment:
    noise = check_noise(a, steps.noise)
    pts = steps.fit.pts
    overload = check_overload(a, settings.max_mixer_dbm, steps.mixer_dbm)
    over = overload.over
    distortion = check_distortion(a, settings.mixer_toi_dbm, noise.noisy, steps.judged, steps.raw_products_dbm)
    phase = check_phase_noise(a, settings)
    analyzer_flag = distortion.share.flagged | phase.flagged
    source = check_source_intermod(a, settings, noise.lower_dbm, noise.upper_dbm, pts.gain_db)
    imbalance = check_imbalance(a)
    region = fit_valid_region(a, over, analyzer_flag, noise.error_db, steps.fit)
    fit = region.fit
    compression = check_compression(pts.gain_db, fit.gain_db, over)

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
        notes=[*distortion.notes, *source.notes, *im2_note_of(analyzer_im2, settings.mixer_shi_dbm)])
