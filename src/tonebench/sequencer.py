"""Measure planned points on an open bench, one committed row per point.

The sequencer speaks in role operations (set a tone, read markers); it never formats SCPI and never
fits anything. RF goes off on every way out of `run`.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

from tonebench.bench import OpenBench
from tonebench.config.bench_file import BenchLimits
from tonebench.config.plan_file import AnalyzerSettings
from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.offsets import LossTable
from tonebench.plan import PlannedPoint
from tonebench.safety import check_source_power, predict_levels
from tonebench.store.records import RunRecorder

ProgressCallback = Callable[[int, int], None]


@dataclass(frozen=True)
class Readings:
    """Analyzer readings of one point, as read (analyzer input plane)."""

    f1_dbm: float
    f2_dbm: float
    lower_dbm: float
    upper_dbm: float
    noise_lower_dbm: float
    noise_upper_dbm: float
    overload: bool
    sweep_time_s: float


class Sequencer:
    def __init__(
        self,
        bench: OpenBench,
        offsets: dict[str, LossTable],
        limits: BenchLimits,
        analyzer_settings: AnalyzerSettings,
        recorder: RunRecorder,
    ):
        self.bench = bench
        self.offsets = offsets
        self.limits = limits
        self.analyzer_settings = analyzer_settings
        self.recorder = recorder
        self.setup = AnalyzerSetup(
            span_hz=analyzer_settings.effective_span_hz,
            rbw_hz=analyzer_settings.rbw_hz,
            vbw_hz=analyzer_settings.effective_vbw_hz,
            atten_db=analyzer_settings.atten_db,
            ref_level_dbm=analyzer_settings.ref_level_dbm,
        )

    def run(self, points: list[PlannedPoint], on_progress: ProgressCallback | None = None) -> None:
        """Measure every point in order; RF is switched off however this returns or raises."""
        started_s = time.monotonic()
        rf_is_on = False
        try:
            self.bench.analyzer.prepare()
            self.bench.analyzer.apply(self.setup)
            for done, point in enumerate(points):
                self._set_tones(point)
                if not rf_is_on:
                    self.bench.rf_on()
                    rf_is_on = True
                    self.recorder.event("info", "rf-on", "RF on at both sources")
                readings = self._read(point)
                self.recorder.add_point(self._row(point, readings, time.monotonic() - started_s))
                if on_progress:
                    on_progress(done + 1, len(points))
        finally:
            self.bench.rf_off_all()
            if rf_is_on:
                self.recorder.event("info", "rf-off", "RF off at both sources")

    def _set_tones(self, point: PlannedPoint) -> None:
        levels = predict_levels(point, self.offsets, self.limits)
        # Checked again here, right before each command, not only in the pre-flight check.
        check_source_power(self.bench.source_ranges[0], levels.source1_dbm, point.key)
        check_source_power(self.bench.source_ranges[1], levels.source2_dbm, point.key)
        self.bench.source1.set_tone(point.f1_hz, levels.source1_dbm)
        self.bench.source2.set_tone(point.f2_hz, levels.source2_dbm)

    def _read(self, point: PlannedPoint) -> Readings:
        analyzer = self.bench.analyzer
        noise_offset_hz = self.analyzer_settings.noise_offset_hz
        # Four narrow-span reads, one per product; the noise floor is read beside each IM3
        # product, on the side away from the tones.
        f1 = analyzer.read_markers(point.f1_hz, [point.f1_hz])
        f2 = analyzer.read_markers(point.f2_hz, [point.f2_hz])
        lower = analyzer.read_markers(point.lower_hz, [point.lower_hz, point.lower_hz - noise_offset_hz])
        upper = analyzer.read_markers(point.upper_hz, [point.upper_hz, point.upper_hz + noise_offset_hz])
        reads = (f1, f2, lower, upper)
        return Readings(
            f1_dbm=f1.powers_dbm[0],
            f2_dbm=f2.powers_dbm[0],
            lower_dbm=lower.powers_dbm[0],
            upper_dbm=upper.powers_dbm[0],
            noise_lower_dbm=lower.powers_dbm[1],
            noise_upper_dbm=upper.powers_dbm[1],
            overload=any(read.overload for read in reads),
            sweep_time_s=sum(read.sweep_time_s for read in reads),
        )

    def _row(self, point: PlannedPoint, readings: Readings, elapsed_s: float) -> dict:
        loss = {
            "in1": self.offsets["in1"].loss_db(point.f1_hz),
            "in2": self.offsets["in2"].loss_db(point.f2_hz),
            "f1": self.offsets["out"].loss_db(point.f1_hz),
            "f2": self.offsets["out"].loss_db(point.f2_hz),
            "lower": self.offsets["out"].loss_db(point.lower_hz),
            "upper": self.offsets["out"].loss_db(point.upper_hz),
        }
        setup = self.setup
        return dict(
            point_key=point.key,
            seq=point.seq,
            status="measured",
            bench_clock_s=elapsed_s,
            center_hz=point.center_hz,
            spacing_hz=point.spacing_hz,
            f1_hz=point.f1_hz,
            f2_hz=point.f2_hz,
            tone_dbm=point.tone_dbm,
            bias_v=point.bias_v,
            source1_dbm=point.tone_dbm + loss["in1"],
            source2_dbm=point.tone_dbm + loss["in2"],
            in1_loss_db=loss["in1"],
            in2_loss_db=loss["in2"],
            out_loss_f1_db=loss["f1"],
            out_loss_f2_db=loss["f2"],
            out_loss_lower_db=loss["lower"],
            out_loss_upper_db=loss["upper"],
            raw_f1_dbm=readings.f1_dbm,
            raw_f2_dbm=readings.f2_dbm,
            raw_lower_dbm=readings.lower_dbm,
            raw_upper_dbm=readings.upper_dbm,
            raw_noise_lower_dbm=readings.noise_lower_dbm,
            raw_noise_upper_dbm=readings.noise_upper_dbm,
            span_hz=setup.span_hz,
            rbw_hz=setup.rbw_hz,
            vbw_hz=setup.vbw_hz,
            atten_db=setup.atten_db,
            ref_level_dbm=setup.ref_level_dbm,
            overload=readings.overload,
            sweep_time_s=readings.sweep_time_s,
            # DUT-referred: the tones were set to their target at the input plane through the
            # input losses; the analyzer readings get the output loss added back.
            pin1_dbm=point.tone_dbm,
            pin2_dbm=point.tone_dbm,
            pout_f1_dbm=readings.f1_dbm + loss["f1"],
            pout_f2_dbm=readings.f2_dbm + loss["f2"],
            im3_lower_dbm=readings.lower_dbm + loss["lower"],
            im3_upper_dbm=readings.upper_dbm + loss["upper"],
            noise_lower_dbm=readings.noise_lower_dbm + loss["lower"],
            noise_upper_dbm=readings.noise_upper_dbm + loss["upper"],
        )
