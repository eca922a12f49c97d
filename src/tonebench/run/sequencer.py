"""Measure planned points on an open bench, one committed point record per point.

The sequencer speaks in role operations (set a tone, read markers); it never formats SCPI and never
fits anything. RF goes off on every way out of `run`. Its parts: what it keeps per sweep
(sweep_state.py), the analyzer's reads (readings.py), the attenuation of each point and the
attenuation-step check (attenuation_choice.py), leveling with a power meter (tone_leveling.py),
the record it stores (point_build.py), and the retries of a faulted point (point_guard.py).

Attenuation (design sections 4 and 5): unless the plan fixes it, each point gets the dynamic-range
optimum for the tone level predicted at the analyzer input: slope 1 from the sweep's last point,
or the bench file's expected gain for its first.
"""

from __future__ import annotations

import time
from collections.abc import Callable

from tonebench.calibration.leveling import Leveler
from tonebench.config.bench_file import BenchLimits, UnattendedSettings
from tonebench.config.plan_file import AnalyzerSettings
from tonebench.errors import InstrumentError
from tonebench.instruments.open_bench import OpenBench
from tonebench.instruments.rf_guard import RfOffReport, raise_if_stopping, shielded
from tonebench.plan.axes import SweepKey
from tonebench.plan.limits import check_source_power, expected_tone_dbm, predict_levels
from tonebench.plan.points import PlannedPoint
from tonebench.planes.loss_table import LossTable
from tonebench.run.attenuation_choice import AttenuationChoice
from tonebench.run.bias_steps import BenchConditions
from tonebench.run.drift import DriftTracker
from tonebench.run.mixer_run import MixerDrive
from tonebench.run.narrowing import read_narrow
from tonebench.run.read_settings import NOISE_MARKERS, TargetReads, tone_setup_for
from tonebench.instruments.detector_setup import point_extra as detector_extra
from tonebench.instruments.detector_setup import use_detector
from tonebench.run.point_build import failed_record, measured_record
from tonebench.run.point_guard import BenchFault, PointFailed, PointGuard, settle_check
from tonebench.run.readings import (
    Measured,
    read_point,
    read_second_order,
    read_tones_dbm,
    second_order_blocked,
)
from tonebench.run.rf_switches import RfSwitches
from tonebench.run.stopped import RunStopped
from tonebench.run.sweep_state import SweepState, sweep_states
from tonebench.run.tone_leveling import ToneLeveling
from tonebench.run.watchdog import Watchdog
from tonebench.store.point_committer import PointCommitter
from tonebench.store.records import RunRecorder
from tonebench.units import format_freq

ProgressCallback = Callable[[int, int], None]


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
        drain_v: float | None = None,
        target_drain_a: float | None = None,
        held_at_c: float | None = None,
        mixer: MixerDrive | None = None,
    ):
        self.bench = bench
        self.mixer = mixer  # a mixer plan: the LO, and the analyzer reading at the IF (run/mixer_run.py)
        self.offsets = offsets
        self.limits = limits
        self.analyzer_settings = analyzer_settings
        self.recorder = recorder
        self.second_order = second_order
        self.unattended = unattended or UnattendedSettings()
        # Events go to the run log (database and text file) when there is one.
        self.log = log if log is not None else recorder
        self.watchdog = watchdog
        self.drift = DriftTracker(self.unattended.drift_tolerance_db, self.log)
        self.rf = RfSwitches(bench)
        # Bias and chamber temperature: drain_v the plan's (else the bench file's [bias]);
        # target_drain_a a drain-current target instead of gate voltages; held_at_c where the
        # caller just soaked (a `bias search` study), so the dwell is not waited again.
        self.conditions = BenchConditions(bench, self.rf, self.log, self._kick, self._check_stop,
                                          drain_v, target_drain_a, held_at_c)
        self.leveling = ToneLeveling(bench, offsets, leveler, self.rf, self.log) if leveler is not None else None
        self.attenuation = AttenuationChoice(bench.analyzer, analyzer_settings, self._say_once)
        self.setup = self.attenuation.setup  # the plan's analyzer setup
        self.target_reads = (TargetReads(self.attenuation, bench.analyzer.predicted_sweep_time_s)
                             if analyzer_settings.reads_to_target else None)
        self.failed_keys: list[str] = []
        self.rf_report: RfOffReport | None = None  # how RF went off at the end of run()
        self.sweeps: dict[SweepKey, SweepState] = {}
        self._rf_said = False
        self._said: set[str] = set()  # events said once per run
        self._levels: dict[str, object] = {}  # point key -> its predicted levels (plan/limits.py)
        # Points are committed on a writer thread while the next one is measured; all are
        # committed (or their commit's error raised) before run() returns or raises.
        self.points_out = PointCommitter(recorder.sessions, recorder.run_id)

    def run(self, points: list[PlannedPoint], on_progress: ProgressCallback | None = None,
            done_keys: frozenset[str] = frozenset()) -> None:
        """Measure every point in order, skipping `done_keys` (already stored: a resumed run);
        RF is switched off however this returns or raises.

        A point that fails all its attempts is stored as failed with the reason, then the bench
        file's on_point_failure decides: continue, or raise RunStopped ('paused' or 'aborted').
        """
        started_s = time.monotonic()
        self.sweeps = sweep_states(points, self.analyzer_settings.step_top_points)
        todo = [point for point in points if point.key not in done_keys]
        done = len(points) - len(todo)
        guard = PointGuard(self.bench.connections, self.bench.sources(), self._restore, self._event_from_guard,
                           self.unattended.point_attempts, self._kick, self._check_stop)
        try:
            use_detector(self.bench.analyzer, self.analyzer_settings.detector_setup)  # sent by prepare()
            self.bench.analyzer.prepare()
            for source in self.bench.sources():
                if source.instrument.has("read_event_status"):
                    source.clear_status()  # the power-on bit of its last switch-on
            self.bench.analyzer.apply(self.setup)
            self.conditions.bias_up(todo)
            if self.leveling is not None:
                self.bench.rf_off_all()  # known state: leveling switches the sources one at a time
            for point in todo:
                self._check_stop()
                self.conditions.set_temperature(point)
                try:
                    measured = guard.measure(point.key, lambda point=point: self._measure(point),
                                             lambda result, point=point: self._settled(point, result))
                except PointFailed as exc:
                    self._fail(point, str(exc), time.monotonic() - started_s)
                else:
                    self._accept(point, measured, time.monotonic() - started_s)
                done += 1
                self._kick()
                if on_progress:
                    on_progress(done, len(points))
        finally:
            with shielded():  # a signal now must not cut the RF off short; it is raised after
                try:
                    self.rf.forget()
                    self._stop_recovery()
                    self.rf_report = self.bench.switch_rf_off()
                    self._say_rf_off(self.rf_report)
                    self.conditions.bias_down()  # after RF, in its safe order
                finally:
                    # Every point committed before the run's end is stored (after RF off: a
                    # commit may wait out a busy timeout); a commit's error is raised here.
                    self.points_out.close()

    def _accept(self, point: PlannedPoint, measured: Measured, elapsed_s: float) -> None:
        """Keep the point's tone readings for its sweep and store its record."""
        readings = measured.readings
        sweep = self.sweeps[point.sweep_key]
        sweep.accept(readings.f1_dbm, readings.f2_dbm, point.tone_dbm)
        products_rbw_hz = measured.setup.rbw_hz if measured.narrow is None else measured.narrow.rbw_hz
        sweep.accept_products(readings.lower_dbm, readings.upper_dbm, readings.noise_lower_dbm,
                              readings.noise_upper_dbm, products_rbw_hz, point.tone_dbm)
        levels = (self._correction(1, point.f1_hz), self._correction(2, point.f2_hz))
        drift = self.drift.observe(point, readings.f1_dbm, readings.f2_dbm)
        record = measured_record(point, measured, elapsed_s, self.offsets, self._source_settings_dbm(point),
                                 levels, drift, None if self.mixer is None else self._read_view(point))
        record.extra_json.update(detector_extra(self.bench.analyzer))  # the mode the noise was read with
        self.points_out.submit(record)

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
        sweep = self.sweeps[point.sweep_key]
        if self.leveling is not None:
            try:
                self.leveling.level_sweep(point, sweep.top_dbm)
            except InstrumentError as exc:
                # The leveler's own refusals are plain InstrumentErrors (I/O faults are subclasses,
                # retried): a correction beyond its limit is a bench fault, not worth a retry.
                if type(exc) is InstrumentError:
                    raise BenchFault(str(exc)) from None
                raise
        self.conditions.set_bias(point)
        if self.mixer is not None:
            self.mixer.set_lo(point)  # LO on before the tones
        self._set_tones(point)
        read_at = self._read_view(point)
        if not self.rf.all_on:
            self.rf.set(True, True)
            if not self._rf_said:
                self._rf_said = True
                self.log.event("info", "rf-on", "RF on at both sources" + ("" if self.mixer is None else " and the LO"))
        def predicted_tone_dbm() -> float:
            return self._predicted_tone_dbm(point, sweep)

        settings, target = self.analyzer_settings, None
        if self.target_reads is not None:
            setup, choice, target = self.target_reads.setup_for(point, predicted_tone_dbm,
                                                                sweep.predicted_product(point.tone_dbm))
        else:
            setup, choice = self.attenuation.setup_for(predicted_tone_dbm)
        analyzer, tone_setup = self.bench.analyzer, tone_setup_for(settings, setup, point.spacing_hz)
        # The noise markers stay the same fraction of the span away, whatever the RBW.
        noise_offset_hz = settings.noise_offset_hz * setup.span_hz / self.setup.span_hz
        noise_offsets_hz = ((noise_offset_hz,) if target is None
                            else tuple(factor * noise_offset_hz for factor in NOISE_MARKERS))
        narrow = None
        # The point's error query on its last read's line only (read_point's last, and the step
        # check's when it reads); with narrowing or second-order reads after, on every read line.
        more_reads = settings.narrowing_budget_s is not None or self.second_order
        with analyzer.errors_read_once(on_every_read=more_reads):
            readings = read_point(analyzer, read_at, noise_offsets_hz, setup, tone_setup, errors_on_last=not more_reads)
            if settings.narrowing_budget_s is not None:
                readings, narrow = read_narrow(
                    analyzer, read_at, setup, readings, noise_offsets_hz, settings.narrowing_budget_s,
                    lambda rbw_hz: self.attenuation.setup_for(predicted_tone_dbm, rbw_hz)[0],
                    None if target is None else self.target_reads.target_db)
            second = self._read_second_order(point, noise_offset_hz) if self.second_order else None
            step = self.attenuation.step_check(read_at, point.tone_dbm in sweep.step_levels_dbm, setup, readings,
                                               noise_offsets_hz)
        chamber_c = None if point.temperature_c is None else self.bench.chamber.temperature_c()
        return Measured(readings, setup, choice, step, second, self.conditions.read_bias(point), chamber_c, narrow,
                        None if tone_setup == setup else tone_setup.rbw_hz, target)

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
        predicted = self.sweeps[point.sweep_key].expected_tones_dbm(point.tone_dbm)
        if predicted is not None and all(abs(read - want) <= tolerance_db for read, want in zip(first, predicted)):
            return None
        # Read where the point's tones were (the step check may have left more attenuation).
        again = read_tones_dbm(self.bench.analyzer, self._read_view(point),
                               tone_setup_for(self.analyzer_settings, measured.setup, point.spacing_hz))
        return settle_check(first, again, tolerance_db)

    def _read_view(self, point: PlannedPoint) -> PlannedPoint:
        """Where the analyzer reads the point: at its frequencies, or a mixer's IF view."""
        return point if self.mixer is None else self.mixer.at_if(point)

    def _fail(self, point: PlannedPoint, reason: str, elapsed_s: float) -> None:
        """Store the point as failed with its reason, then apply the on_point_failure policy."""
        self.points_out.submit(failed_record(point, reason, elapsed_s))
        self.failed_keys.append(point.key)
        policy = self.unattended.on_point_failure
        self.log.event("error", "point-failed", f"point {point.name}: {reason}; on_point_failure = {policy}",
                       {"point_key": point.key, "policy": policy})
        if policy == "pause":
            self.log.event("warning", "pause", f"run paused at point {point.name}; RF off; "
                                               "`tonebench resume` measures it again and goes on")
            raise RunStopped("paused", f"paused at point {point.name}: {reason}")
        if policy == "abort":
            raise RunStopped("aborted", f"aborted at point {point.name}: {reason}")

    def _restore(self) -> None:
        self.rf.take_from_sources()
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

    def _predicted_tone_dbm(self, point: PlannedPoint, sweep: SweepState) -> float:
        """Tone level (dBm) expected at the analyzer input: slope 1 from the sweep's last point,
        or the expected gain less the output loss at f1 for its first."""
        predicted = sweep.predicted_tone_dbm(point.tone_dbm)
        if predicted is not None:
            return predicted
        return expected_tone_dbm(self._read_view(point), self.offsets, self.limits)  # at the IF for a mixer

    def _read_second_order(self, point: PlannedPoint, noise_offset_hz: float):
        blocked = second_order_blocked(self.bench.analyzer.limits, self.setup.span_hz, self.offsets["out"], point)
        if blocked is not None:
            self._say_once(f"second-order {point.center_hz} {point.spacing_hz}", "warning", "second-order-skipped",
                           f"second order not read at {format_freq(point.center_hz)} / {format_freq(point.spacing_hz)}: {blocked}")
            return None
        return read_second_order(self.bench.analyzer, point, noise_offset_hz)

    def _say_once(self, key: str, level: str, kind: str, message: str) -> None:
        if key not in self._said:
            self._said.add(key)
            self.log.event(level, kind, message)

    def _correction(self, index: int, freq_hz: float):
        return self.leveling.correction(index, freq_hz) if self.leveling is not None else None

    def _set_tones(self, point: PlannedPoint) -> None:
        settings_dbm = self._source_settings_dbm(point)
        # Checked again here, right before each command, not only in the pre-flight check.
        check_source_power(self.bench.source_ranges[0], settings_dbm[0], point.key)
        check_source_power(self.bench.source_ranges[1], settings_dbm[1], point.key)
        # Source 1 takes its settings, source 2 is set and waited for, then source 1's *OPC?:
        # the two settle at the same time (one settle time per point, not two).
        if self.bench.source1.start_tone(point.f1_hz, settings_dbm[0]):
            self.bench.source2.set_tone(point.f2_hz, settings_dbm[1])
            self.bench.source1.finish_tone()
        else:
            self.bench.source2.set_tone(point.f2_hz, settings_dbm[1])

    def _source_settings_dbm(self, point: PlannedPoint) -> tuple[float, float]:
        """Both open-loop settings, each plus its tone's leveling correction when leveled."""
        levels = self._levels.get(point.key)
        if levels is None:  # fixed for the run (losses and limits): worked out once per point
            levels = self._levels[point.key] = predict_levels(point, self.offsets, self.limits)
        settings = [levels.source1_dbm, levels.source2_dbm]
        for index, freq_hz in ((1, point.f1_hz), (2, point.f2_hz)):
            level = self._correction(index, freq_hz)
            if level is not None:
                settings[index - 1] += level.correction_db
        return settings[0], settings[1]
