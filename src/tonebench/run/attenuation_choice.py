"""The analyzer setup of each point (design sections 4 and 5).

Unless the plan fixes it, each point gets the dynamic-range optimum for the tone level predicted
at the analyzer input. The attenuation-step check repeats the IM3 reads with more attenuation
(reference level moved with it) at the top points of each sweep and wherever the analyzer's own
IM3, predicted from its mixer TOI, comes within SYSTEM_MARGIN_DB of the reading.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace

from tonebench.analysis.attenuation import analyzer_im3_dbm, optimum_atten_db
from tonebench.analysis.flags import SYSTEM_MARGIN_DB
from tonebench.config.plan_file import AnalyzerSettings
from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.plan.points import PlannedPoint
from tonebench.run.narrowing import narrowed
from tonebench.run.readings import Readings, StepReadings, step_readings

SayOnce = Callable[[str, str, str, str], None]  # (once-key, level, kind, message)


def plan_setup(settings: AnalyzerSettings) -> AnalyzerSetup:
    """The analyzer setup the plan asks for."""
    return AnalyzerSetup(
        span_hz=settings.effective_span_hz,
        rbw_hz=settings.rbw_hz,
        vbw_hz=settings.effective_vbw_hz,
        atten_db=settings.atten_db,
        ref_level_dbm=settings.ref_level_dbm,
    )


class AttenuationChoice:
    def __init__(self, analyzer, settings: AnalyzerSettings, say_once: SayOnce):
        self.analyzer = analyzer
        self.settings = settings
        self.say_once = say_once
        self.setup = plan_setup(settings)

    def ref_level_dbm(self, atten_db: float) -> float:
        """The plan's reference level, moved dB for dB with the attenuation from the plan's atten_db,
        and kept at or under the analyzer's damage level (no screen needs to show more)."""
        ref_dbm = self.settings.ref_level_dbm + atten_db - self.settings.atten_db
        return min(ref_dbm, self.analyzer.limits.get("damage_dbm", ref_dbm))

    def setup_for(self, predicted_tone_dbm: Callable[[], float],
                  rbw_hz: float | None = None) -> tuple[AnalyzerSetup, str]:
        """The analyzer setup of a point and how its attenuation was chosen; with rbw_hz, that
        of a narrower read (span and VBW narrowed with it, the optimum at its lower noise)."""
        base = self.setup if rbw_hz is None else narrowed(self.setup, rbw_hz)
        if not self.settings.auto_atten:
            return base, "fixed"
        perf, lim = self.analyzer.performance, self.analyzer.limits
        choice = optimum_atten_db(
            predicted_tone_dbm(), perf["mixer_toi_dbm"], perf["danl_dbm_per_hz"], base.rbw_hz,
            lim["min_atten_db"], lim["max_atten_db"], lim.get("atten_step_db", 1.0), lim.get("max_mixer_dbm"),
        )
        setup = replace(base, atten_db=choice.atten_db, ref_level_dbm=self.ref_level_dbm(choice.atten_db))
        return setup, choice.limited_by

    def step_reason(self, is_top: bool, setup: AnalyzerSetup, readings: Readings) -> str | None:
        """Why the IM3 is read again with more attenuation ("top" or "near"), or None."""
        if is_top:
            return "top"
        predicted = analyzer_im3_dbm(readings.f1_dbm, readings.f2_dbm, setup.atten_db,
                                     self.analyzer.performance["mixer_toi_dbm"])
        margin_db = min(readings.lower_dbm - float(predicted[0]), readings.upper_dbm - float(predicted[1]))
        return "near" if margin_db < SYSTEM_MARGIN_DB else None

    def step_check(self, point: PlannedPoint, is_top: bool, setup: AnalyzerSetup, readings: Readings,
                   noise_offsets_hz: tuple[float, ...]) -> StepReadings | None:
        """Read the IM3 products again with more attenuation where the step check is due."""
        reason = self.step_reason(is_top, setup, readings)
        if reason is None:
            return None
        wanted_db = self.settings.step_atten_db
        atten_db = min(setup.atten_db + wanted_db, self.analyzer.limits["max_atten_db"])
        step_db = atten_db - setup.atten_db
        if step_db < wanted_db / 2.0:
            self.say_once("step-check", "warning", "step-skipped",
                          f"attenuation-step check skipped: {setup.atten_db:g} dB is within "
                          f"{wanted_db / 2.0:g} dB of the analyzer's maximum")
            return None
        self.analyzer.apply(replace(setup, atten_db=atten_db, ref_level_dbm=self.ref_level_dbm(atten_db)))
        return step_readings(self.analyzer, point, noise_offsets_hz, step_db, reason)
