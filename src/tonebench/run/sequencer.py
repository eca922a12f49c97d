"""Measure planned points on an open bench, one committed row per point.

The sequencer speaks in role operations (set a tone, read markers); it never formats SCPI and never
fits anything. RF goes off on every way out of `run`.

Leveling (when the bench has a power meter): at the start of each sweep (one centre, spacing and
bias), each tone is leveled at the sweep's highest tone power, one source on at a time, and the
correction is kept per source and frequency and applied to every point of the sweep (sources are
taken to be linear in level over a sweep). That costs a few meter readings per sweep instead of
per point; a later sweep at the same tone frequency reuses the correction.

Attenuation (design sections 4 and 5): unless the plan fixes it, each point gets the dynamic-range
optimum for the tone level predicted at the analyzer input (slope 1 from the sweep's last point,
or the bench file's expected gain for its first). The attenuation-step check repeats the IM3
reads with more attenuation (reference level moved with it) at the top points of each sweep and
wherever the analyzer's own IM3, predicted from its mixer TOI, comes within 20 dB of the reading.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, replace

from tonebench.analysis.attenuation import analyzer_im3_dbm, optimum_atten_db
from tonebench.analysis.flags import SYSTEM_MARGIN_DB
from tonebench.instruments.open_bench import OpenBench
from tonebench.calibration.leveling import IMBALANCE_LIMIT_DB, Leveler, LevelResult
from tonebench.planes.referral import point_offsets, referred_values
from tonebench.config.bench_file import BenchLimits
from tonebench.config.plan_file import AnalyzerSettings
from tonebench.run.drift import DriftTracker
from tonebench.errors import InputError, InstrumentError
from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.planes.loss_table import LossTable
from tonebench.config.bench_file import UnattendedSettings
from tonebench.plan.points import PlannedPoint
from tonebench.run.point_guard import BenchFault, PointFailed, PointGuard, settle_check
from tonebench.store.point_record import PointRecord
from tonebench.store.point_writer import store_point
from tonebench.instruments.rf_guard import RfOffReport, raise_if_stopping, shielded
from tonebench.plan.limits import check_source_power, predict_levels
from tonebench.store.records import RunRecorder
from tonebench.run.watchdog import Watchdog

ProgressCallback = Callable[[int, int], None]


class RunStopped(Exception):
    """The bench file's on_point_failure policy stopped the run: status 'paused' or 'aborted'."""

    def __init__(self, status: str, reason: str):
        super().__init__(reason)
        self.status = status


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


@dataclass(frozen=True)
class StepReadings:
    """The IM3 reads repeated with step_atten_db more attenuation (analyzer input plane, dBm)."""

    step_atten_db: float
    lower_dbm: float
    upper_dbm: float
    noise_lower_dbm: float
    noise_upper_dbm: float
    reason: str  # "top" (a top point of its sweep) or "near" (analyzer IM3 predicted within 20 dB)
    sweep_time_s: float


@dataclass(frozen=True)
class Measured:
    """Everything one attempt at a point read, before it is accepted."""

    readings: Readings
    setup: AnalyzerSetup
    choice: str
    step: StepReadings | None
    second: SecondOrderReadings | None


@dataclass(frozen=True)
class SecondOrderReadings:
    """f2-f1 ("diff") and f1+f2 ("sum") with a noise marker beside each (analyzer input, dBm)."""

    diff_dbm: float
    sum_dbm: float
    noise_diff_dbm: float
    noise_sum_dbm: float
    sweep_time_s: float


def _extrapolate(history: list[tuple[float, float, float]], tone_dbm: float) -> tuple[float, float]:
    """Tone readings (f1, f2 dBm) expected at tone_dbm from the last one or two (f1, f2, tone_dbm)."""
    f1_dbm, f2_dbm, last_dbm = history[-1]
    slopes = (1.0, 1.0)
    if len(history) == 2 and history[0][2] != last_dbm:
        before = history[0]
        slopes = ((f1_dbm - before[0]) / (last_dbm - before[2]), (f2_dbm - before[1]) / (last_dbm - before[2]))
    step_db = tone_dbm - last_dbm
    return f1_dbm + slopes[0] * step_db, f2_dbm + slopes[1] * step_db


class Sequencer:
    def __init__(
        self,
        bench: OpenBench,
        offsets: dict[str, LossTable],
        limits: BenchLimits,
        analyzer_settings: AnalyzerSettings,
        recorder: RunRecorder,
        leveler: Leveler | None = None,
        second_order: bool = False,
        unattended: UnattendedSettings | None = None,
        log=None,
        watchdog: Watchdog | None = None,
    ):
        self.bench = bench
        self.offsets = offsets
        self.limits = limits
        self.analyzer_settings = analyzer_settings
        self.recorder = recorder
        self.leveler = leveler
        self.second_order = second_order
        self.unattended = unattended or UnattendedSettings()
        # Events go to the run log (database and text file) when there is one.
        self.log = log if log is not None else recorder
        self.watchdog = watchdog
        self.drift = DriftTracker(self.unattended.drift_tolerance_db, self.log)
        self.failed_keys: list[str] = []
        self.rf_report: RfOffReport | None = None  # how RF went off at the end of run()
        self._rf_said = False
        self._top_dbm: dict[tuple, float] = {}
        # sweep key -> (f1 dBm, f2 dBm, tone_dbm) of its last two accepted points (the settle check)
        self._last_tones: dict[tuple, list[tuple[float, float, float]]] = {}
        # sweep key -> (mean raw tone reading dBm, its tone_dbm): predicts the next point's level
        self._last_tone: dict[tuple, tuple[float, float]] = {}
        self._top_levels: dict[tuple, set[float]] = {}
        self._said: set[str] = set()  # events said once per run
        # (source index, freq_hz) -> leveling result, kept for the run
        self._levels: dict[tuple[int, float], LevelResult] = {}
        self._rf = [False, False]
        self.setup = AnalyzerSetup(
            span_hz=analyzer_settings.effective_span_hz,
            rbw_hz=analyzer_settings.rbw_hz,
            vbw_hz=analyzer_settings.effective_vbw_hz,
            atten_db=analyzer_settings.atten_db,
            ref_level_dbm=analyzer_settings.ref_level_dbm,
        )

    def run(self, points: list[PlannedPoint], on_progress: ProgressCallback | None = None,
            done_keys: frozenset[str] = frozenset()) -> None:
        """Measure every point in order, skipping `done_keys` (already stored: a resumed run);
        RF is switched off however this returns or raises.

        A point that fails all its attempts is stored as failed with the reason, then the bench
        file's on_point_failure decides: continue, or raise RunStopped ('paused' or 'aborted').
        """
        started_s = time.monotonic()
        self._top_dbm = self._sweep_tops_dbm(points)
        self._top_levels = self._sweep_top_levels(points)
        todo = [point for point in points if point.key not in done_keys]
        done = len(points) - len(todo)
        guard = PointGuard(self.bench.connections, self.bench.sources(), self._restore, self._event_from_guard,
                           self.unattended.point_attempts, self._kick, self._check_stop)
        try:
            self.bench.analyzer.prepare()
            self.bench.analyzer.apply(self.setup)
            if self.leveler is not None:
                self.bench.rf_off_all()  # known state: leveling switches the sources one at a time
            for point in todo:
                self._check_stop()
                try:
                    measured = guard.measure(point.key, lambda point=point: self._measure(point),
                                             lambda result, point=point: self._settled(point, result))
                except PointFailed as exc:
                    self._fail(point, str(exc), time.monotonic() - started_s)
                else:
                    readings, setup = measured.readings, measured.setup
                    self._last_tone[self._sweep_key(point)] = ((readings.f1_dbm + readings.f2_dbm) / 2.0, point.tone_dbm)
                    history = self._last_tones.setdefault(self._sweep_key(point), [])
                    history[:] = [*history[-1:], (readings.f1_dbm, readings.f2_dbm, point.tone_dbm)]
                    row = self._row(point, readings, time.monotonic() - started_s, setup)
                    row.update(self._extra_columns(point, measured.choice, measured.step, measured.second, row))
                    if drift := self.drift.observe(point, readings.f1_dbm, readings.f2_dbm):
                        row["extra_json"] = {**row["extra_json"], "source_drift": drift}
                    store_point(self.recorder.sessions, self.recorder.run_id, PointRecord(**row))
                done += 1
                self._kick()
                if on_progress:
                    on_progress(done, len(points))
        finally:
            with shielded():  # a signal now must not cut the RF off short; it is raised after
                self._rf = [False, False]
                self._stop_recovery()
                self.rf_report = self.bench.switch_rf_off()
                self._say_rf_off(self.rf_report)

    def _stop_recovery(self) -> None:
        """No more retries, and no restore turns RF on again: the run is ending."""
        for connection in self.bench.connections:
            if connection.supervision is not None:
                connection.supervision.stop.set()

    def _say_rf_off(self, report: RfOffReport) -> None:
        if not (self._rf_said or not report.ok):
            return
        try:
            if report.ok:
                self.log.event("info", "rf-off", report.line())
            else:
                self.log.event("error", "rf-not-off", report.line(), {"sources": report.unconfirmed})
        except Exception:  # noqa: BLE001 - the run's end is still recorded by the runner
            pass

    def _measure(self, point: PlannedPoint) -> Measured:
        """One attempt at a point: tones set (leveled), RF on, every read it needs."""
        if self.leveler is not None:
            try:
                self._level_sweep(point, self._top_dbm[self._sweep_key(point)])
            except InstrumentError as exc:
                # The leveler's own refusals are plain InstrumentErrors (I/O faults are subclasses,
                # retried): a correction beyond its limit is a bench fault, not worth a retry.
                if type(exc) is InstrumentError:
                    raise BenchFault(str(exc)) from None
                raise
        self._set_tones(point)
        if not all(self._rf):
            self._set_rf(True, True)
            if not self._rf_said:
                self._rf_said = True
                self.log.event("info", "rf-on", "RF on at both sources")
        setup, choice = self._setup_for(point)
        self.bench.analyzer.apply(setup)
        readings = self._read(point)
        second = self._read_second_order(point) if self.second_order else None
        step = self._step_check(point, setup, readings)
        return Measured(readings, setup, choice, step, second)

    def _settled(self, point: PlannedPoint, measured: Measured) -> str | None:
        """Why the tone levels may still have been moving during the point, or None.

        Tones on the line through the sweep's last two accepted points (slope 1 through the last
        one when there is only one), within the tolerance, are taken as settled: a level still
        moving would be off that line. Otherwise (the first point of a sweep, the onset of
        compression, a moving level) both tones are read again at the end of the point and must
        agree with the first reads. So the repeat reads cost sweeps only where needed.
        """
        tolerance_db = self.unattended.settle_tolerance_db
        if tolerance_db <= 0:
            return None
        first = (measured.readings.f1_dbm, measured.readings.f2_dbm)
        history = self._last_tones.get(self._sweep_key(point), [])
        if history:
            predicted = _extrapolate(history, point.tone_dbm)
            if all(abs(read - want) <= tolerance_db for read, want in zip(first, predicted)):
                return None
        analyzer = self.bench.analyzer
        analyzer.apply(measured.setup)  # the step check may have left more attenuation
        again = (analyzer.read_markers(point.f1_hz, [point.f1_hz]).powers_dbm[0],
                 analyzer.read_markers(point.f2_hz, [point.f2_hz]).powers_dbm[0])
        return settle_check(first, again, tolerance_db)

    def _fail(self, point: PlannedPoint, reason: str, elapsed_s: float) -> None:
        """Store the point as failed with its reason, then apply the on_point_failure policy."""
        store_point(self.recorder.sessions, self.recorder.run_id, PointRecord(
            point_key=point.key, seq=point.seq, status="failed", fail_reason=reason, bench_clock_s=elapsed_s,
            center_hz=point.center_hz, spacing_hz=point.spacing_hz, f1_hz=point.f1_hz, f2_hz=point.f2_hz,
            tone_dbm=point.tone_dbm, bias_v=point.bias_v,
        ))
        self.failed_keys.append(point.key)
        policy = self.unattended.on_point_failure
        self.log.event("error", "point-failed", f"point {point.key}: {reason}; on_point_failure = {policy}",
                       {"point_key": point.key, "policy": policy})
        if policy == "pause":
            self.log.event("warning", "pause", f"run paused at point {point.key}; RF off; "
                                               "`tonebench resume` measures it again and goes on")
            raise RunStopped("paused", f"paused at point {point.key}: {reason}")
        if policy == "abort":
            raise RunStopped("aborted", f"aborted at point {point.key}: {reason}")

    def _restore(self) -> None:
        self._rf = [source.wanted.rf_on for source in self.bench.sources()]
        self.bench.restore_all()

    def _event_from_guard(self, level: str, kind: str, message: str, details: dict) -> None:
        self.log.event(level, kind, message, details)

    def _kick(self) -> None:
        if self.watchdog is not None:
            self.watchdog.kick()

    def _check_stop(self) -> None:
        raise_if_stopping()  # a Ctrl-C or SIGTERM whose exception was swallowed somewhere
        if self.watchdog is not None:
            self.watchdog.check()

    @staticmethod
    def _sweep_key(point: PlannedPoint) -> tuple:
        return (point.center_hz, point.spacing_hz, point.bias_v)

    def _sweep_tops_dbm(self, points: list[PlannedPoint]) -> dict[tuple, float]:
        tops: dict[tuple, float] = {}
        for point in points:
            key = self._sweep_key(point)
            tops[key] = max(tops.get(key, point.tone_dbm), point.tone_dbm)
        return tops

    def _sweep_top_levels(self, points: list[PlannedPoint]) -> dict[tuple, set[float]]:
        levels: dict[tuple, set[float]] = {}
        for point in points:
            levels.setdefault(self._sweep_key(point), set()).add(point.tone_dbm)
        count = self.analyzer_settings.step_top_points
        return {key: set(sorted(values)[-count:]) if count else set() for key, values in levels.items()}

    # --- attenuation ----------------------------------------------------------------------------

    def _ref_level_dbm(self, atten_db: float) -> float:
        """The plan's reference level, moved dB for dB with the attenuation from the plan's atten_db,
        and kept at or under the analyzer's damage level (no screen needs to show more)."""
        settings = self.analyzer_settings
        ref_dbm = settings.ref_level_dbm + atten_db - settings.atten_db
        return min(ref_dbm, self.bench.analyzer.limits.get("damage_dbm", ref_dbm))

    def _predicted_tone_dbm(self, point: PlannedPoint) -> float:
        """Tone level (dBm) expected at the analyzer input: slope 1 from the sweep's last point."""
        last = self._last_tone.get(self._sweep_key(point))
        if last is not None:
            return last[0] + point.tone_dbm - last[1]
        return point.tone_dbm + self.limits.expected_gain_db - self.offsets["out"].loss_db(point.f1_hz)

    def _setup_for(self, point: PlannedPoint) -> tuple[AnalyzerSetup, str]:
        """The analyzer setup of this point and how its attenuation was chosen."""
        if not self.analyzer_settings.auto_atten:
            return self.setup, "fixed"
        analyzer = self.bench.analyzer
        perf, lim = analyzer.performance, analyzer.limits
        choice = optimum_atten_db(
            self._predicted_tone_dbm(point), perf["mixer_toi_dbm"], perf["danl_dbm_per_hz"], self.setup.rbw_hz,
            lim["min_atten_db"], lim["max_atten_db"], lim.get("atten_step_db", 1.0), lim.get("max_mixer_dbm"),
        )
        setup = replace(self.setup, atten_db=choice.atten_db, ref_level_dbm=self._ref_level_dbm(choice.atten_db))
        return setup, choice.limited_by

    def _step_check(self, point: PlannedPoint, setup: AnalyzerSetup, readings: Readings) -> StepReadings | None:
        """Read the IM3 products again with more attenuation where the step check is due."""
        analyzer = self.bench.analyzer
        if point.tone_dbm in self._top_levels.get(self._sweep_key(point), ()):
            reason = "top"
        else:
            predicted = analyzer_im3_dbm(readings.f1_dbm, readings.f2_dbm, setup.atten_db,
                                         analyzer.performance["mixer_toi_dbm"])
            margin_db = min(readings.lower_dbm - float(predicted[0]), readings.upper_dbm - float(predicted[1]))
            if not margin_db < SYSTEM_MARGIN_DB:
                return None
            reason = "near"
        atten_db = min(setup.atten_db + self.analyzer_settings.step_atten_db, analyzer.limits["max_atten_db"])
        step_db = atten_db - setup.atten_db
        if step_db < self.analyzer_settings.step_atten_db / 2.0:
            self._say_once("step-check", "warning", "step-skipped",
                           f"attenuation-step check skipped: {setup.atten_db:g} dB is within "
                           f"{self.analyzer_settings.step_atten_db / 2.0:g} dB of the analyzer's maximum")
            return None
        analyzer.apply(replace(setup, atten_db=atten_db, ref_level_dbm=self._ref_level_dbm(atten_db)))
        lower, upper = self._read_im3(point)
        return StepReadings(step_db, lower.powers_dbm[0], upper.powers_dbm[0], lower.powers_dbm[1],
                            upper.powers_dbm[1], reason, lower.sweep_time_s + upper.sweep_time_s)

    # --- second order ---------------------------------------------------------------------------

    def _second_order_blocked(self, point: PlannedPoint) -> str | None:
        """Why f2-f1 and f1+f2 cannot be read for this point, or None."""
        diff_hz, sum_hz = point.f2_hz - point.f1_hz, point.f1_hz + point.f2_hz
        lim = self.bench.analyzer.limits
        half_span_hz = self.setup.span_hz / 2.0
        if diff_hz - half_span_hz < lim["min_freq_hz"] or sum_hz + half_span_hz > lim["max_freq_hz"]:
            return (f"f2-f1 = {diff_hz:.6g} Hz or f1+f2 = {sum_hz:.6g} Hz outside the analyzer's "
                    f"{lim['min_freq_hz']:.6g}..{lim['max_freq_hz']:.6g} Hz")
        try:
            self.offsets["out"].loss_db(diff_hz)
            self.offsets["out"].loss_db(sum_hz)
        except InputError as exc:
            return f"no output loss there: {exc}"
        return None

    def _read_second_order(self, point: PlannedPoint) -> SecondOrderReadings | None:
        blocked = self._second_order_blocked(point)
        if blocked is not None:
            self._say_once(f"second-order {point.center_hz} {point.spacing_hz}", "warning", "second-order-skipped",
                           f"second order not read at {point.center_hz:.6g} Hz / {point.spacing_hz:.6g} Hz: {blocked}")
            return None
        analyzer = self.bench.analyzer
        offset_hz = self.analyzer_settings.noise_offset_hz
        diff_hz, sum_hz = point.f2_hz - point.f1_hz, point.f1_hz + point.f2_hz
        diff = analyzer.read_markers(diff_hz, [diff_hz, diff_hz + offset_hz])
        total = analyzer.read_markers(sum_hz, [sum_hz, sum_hz + offset_hz])
        return SecondOrderReadings(diff.powers_dbm[0], total.powers_dbm[0], diff.powers_dbm[1], total.powers_dbm[1],
                                   diff.sweep_time_s + total.sweep_time_s)

    def _say_once(self, key: str, level: str, kind: str, message: str) -> None:
        if key not in self._said:
            self._said.add(key)
            self.log.event(level, kind, message)

    def _extra_columns(self, point: PlannedPoint, choice: str, step: StepReadings | None,
                       second: SecondOrderReadings | None, row: dict) -> dict:
        """Step-check and second-order columns of the point row, and what has no column (extra_json)."""
        extra: dict = {"atten_choice": choice}
        columns: dict = {}
        if step is not None:
            columns.update(step_atten_db=step.step_atten_db, raw_lower_step_dbm=step.lower_dbm,
                           raw_upper_step_dbm=step.upper_dbm)
            extra.update(raw_noise_lower_step_dbm=step.noise_lower_dbm, raw_noise_upper_step_dbm=step.noise_upper_dbm,
                         step_reason=step.reason, step_sweep_time_s=step.sweep_time_s)
        if second is not None:
            diff_loss_db = self.offsets["out"].loss_db(point.f2_hz - point.f1_hz)
            sum_loss_db = self.offsets["out"].loss_db(point.f1_hz + point.f2_hz)
            columns.update(raw_diff_dbm=second.diff_dbm, raw_sum_dbm=second.sum_dbm, out_loss_diff_db=diff_loss_db,
                           out_loss_sum_db=sum_loss_db, im2_diff_dbm=second.diff_dbm + diff_loss_db,
                           im2_sum_dbm=second.sum_dbm + sum_loss_db)
            extra.update(raw_noise_diff_dbm=second.noise_diff_dbm, raw_noise_sum_dbm=second.noise_sum_dbm)
        extra_time_s = sum(r.sweep_time_s for r in (step, second) if r is not None)
        columns["sweep_time_s"] = row["sweep_time_s"] + extra_time_s
        columns["extra_json"] = {**(row.get("extra_json") or {}), **extra}
        return columns

    def _set_rf(self, on1: bool, on2: bool) -> None:
        """Switch each source only if its state changes (off first, so two tones never meet the meter)."""
        wanted = [on1, on2]
        for index in sorted((0, 1), key=lambda i: wanted[i]):
            if self._rf[index] != wanted[index]:
                source = self.bench.sources()[index]
                source.rf_on() if wanted[index] else source.rf_off()
                self._rf[index] = wanted[index]

    def _level_sweep(self, point: PlannedPoint, reference_dbm: float) -> None:
        """Level both tones of this point's sweep at reference_dbm, unless already done for their frequencies."""
        tones = ((1, point.f1_hz, "in1"), (2, point.f2_hz, "in2"))
        if all((index, freq_hz) in self._levels for index, freq_hz, _ in tones):
            return
        for index, freq_hz, path in tones:
            if (index, freq_hz) in self._levels:
                continue
            source = self.bench.sources()[index - 1]
            open_loop_dbm = reference_dbm + self.offsets[path].loss_db(freq_hz)
            check_source_power(self.bench.source_ranges[index - 1], open_loop_dbm, point.key)
            source.set_tone(freq_hz, open_loop_dbm)
            self._set_rf(index == 1, index == 2)  # a broadband meter must see one tone only
            result = self.leveler.level(source, self.bench.source_ranges[index - 1], freq_hz, reference_dbm,
                                        open_loop_dbm)
            self._levels[(index, freq_hz)] = result
            if not result.converged:
                self.log.event(
                    "warning", "leveling",
                    f"source{index} at {freq_hz:.6g} Hz: {result.error_db:+.3f} dB from its target after "
                    f"{result.readings} readings (tolerance {self.leveler.tolerance_db:g} dB)",
                    {"source": index, "freq_hz": freq_hz, "error_db": result.error_db,
                     "correction_db": result.correction_db},
                )
        self._set_rf(False, False)
        first, second = (self._levels[(index, freq_hz)] for index, freq_hz, _ in tones)
        imbalance_db = first.error_db - second.error_db
        if abs(imbalance_db) > IMBALANCE_LIMIT_DB:
            self.log.event(
                "warning", "tone-imbalance",
                f"sweep {point.center_hz:.6g} Hz / {point.spacing_hz:.6g} Hz: tones differ by {imbalance_db:+.2f} dB "
                f"at the DUT input plane (limit {IMBALANCE_LIMIT_DB} dB)",
                {"center_hz": point.center_hz, "spacing_hz": point.spacing_hz, "imbalance_db": imbalance_db},
            )

    def _correction(self, index: int, freq_hz: float) -> LevelResult | None:
        return self._levels.get((index, freq_hz)) if self.leveler is not None else None

    def _set_tones(self, point: PlannedPoint) -> None:
        settings_dbm = self._source_settings_dbm(point)
        # Checked again here, right before each command, not only in the pre-flight check.
        check_source_power(self.bench.source_ranges[0], settings_dbm[0], point.key)
        check_source_power(self.bench.source_ranges[1], settings_dbm[1], point.key)
        self.bench.source1.set_tone(point.f1_hz, settings_dbm[0])
        self.bench.source2.set_tone(point.f2_hz, settings_dbm[1])

    def _source_settings_dbm(self, point: PlannedPoint) -> tuple[float, float]:
        levels = predict_levels(point, self.offsets, self.limits)
        settings = [levels.source1_dbm, levels.source2_dbm]
        for index, freq_hz in ((1, point.f1_hz), (2, point.f2_hz)):
            level = self._correction(index, freq_hz)
            if level is not None:
                settings[index - 1] += level.correction_db
        return settings[0], settings[1]

    def _read(self, point: PlannedPoint) -> Readings:
        analyzer = self.bench.analyzer
        # Four narrow-span reads, one per product; the noise floor is read beside each IM3
        # product, on the side away from the tones.
        f1 = analyzer.read_markers(point.f1_hz, [point.f1_hz])
        f2 = analyzer.read_markers(point.f2_hz, [point.f2_hz])
        lower, upper = self._read_im3(point)
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

    def _read_im3(self, point: PlannedPoint):
        """Both IM3 products, each with a noise marker on the side away from the tones."""
        analyzer = self.bench.analyzer
        noise_offset_hz = self.analyzer_settings.noise_offset_hz
        lower = analyzer.read_markers(point.lower_hz, [point.lower_hz, point.lower_hz - noise_offset_hz])
        upper = analyzer.read_markers(point.upper_hz, [point.upper_hz, point.upper_hz + noise_offset_hz])
        return lower, upper

    def _row(self, point: PlannedPoint, readings: Readings, elapsed_s: float, setup: AnalyzerSetup) -> dict:
        offsets = point_offsets(self.offsets, point.f1_hz, point.f2_hz)
        source1_dbm, source2_dbm = self._source_settings_dbm(point)
        level1, level2 = self._correction(1, point.f1_hz), self._correction(2, point.f2_hz)
        row = dict(
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
            source1_dbm=source1_dbm,
            source2_dbm=source2_dbm,
            source1_correction_db=None if level1 is None else level1.correction_db,
            source2_correction_db=None if level2 is None else level2.correction_db,
            # A leveled tone is at its target plus the error the meter last saw; an open-loop one
            # is worked out from the input loss (referred_values).
            pin1_dbm=None if level1 is None else point.tone_dbm + level1.error_db,
            pin2_dbm=None if level2 is None else point.tone_dbm + level2.error_db,
            **{column: value for column, value in offsets.items() if value is not None},
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
        )
        # DUT-referred: inputs at the input plane, analyzer readings plus the output loss.
        row.update(referred_values(row, offsets))
        return row
