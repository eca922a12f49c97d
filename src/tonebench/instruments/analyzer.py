"""Spectrum analyzer role driver: settings, a single sweep, marker reads at given frequencies."""

from __future__ import annotations

import contextlib
import math
from collections.abc import Sequence
from dataclasses import dataclass

from tonebench.errors import InstrumentError
from tonebench.instruments.scpi import (
    ImpossibleReading,
    LimitError,
    RoleDriver,
    ScpiInstrument,
)
from tonebench.units import thermal_noise_dbm_per_hz
from tonebench.units import format_freq

# Reads of one product before giving up when each is cut by a reopened connection.
MAX_READ_ATTEMPTS = 3
# Relative change of the reported sweep time taken as changed settings.
SWEEP_TIME_TOLERANCE = 0.01
# Bounds of a marker reading any analyzer can produce (see judge_marker_dbm). Above: the damage
# level plus 3 dB (twice the power that destroys the input; an analyzer's absolute level error is
# well under 1 dB, from memory of typical data sheets). Below: thermal noise kT (290 K, -174 dBm/Hz)
# in the RBW less 50 dB: no analyzer's noise floor lies under kTB, and even an unaveraged noise
# sample (Rayleigh amplitude) falls 50 dB under its mean with probability about 1e-5, while
# placeholder replies such as -200 or -999 dBm are caught.
ABOVE_DAMAGE_DB = 3.0
BELOW_THERMAL_DB = 50.0


def sweep_time_model_s(factor: float, span_hz: float, rbw_hz: float, vbw_hz: float | None = None) -> float:
    """Swept-analyzer sweep time k * span / RBW^2 (design section 5), k * span / (RBW * VBW) with
    a video filter narrower than the RBW (it settles that much slower; common practice): the one
    model, for a run's timeouts and for the bench-time estimate made before anything is connected."""
    video_hz = rbw_hz if vbw_hz is None else min(rbw_hz, vbw_hz)
    return factor * span_hz / (rbw_hz * video_hz)


@dataclass(frozen=True)
class AnalyzerSetup:
    """Analyzer settings that do not change with the tone frequencies."""

    span_hz: float
    rbw_hz: float
    vbw_hz: float
    atten_db: float
    ref_level_dbm: float


@dataclass(frozen=True)
class MarkerReading:
    """Marker powers (dBm, in the order asked), the overload flag, and the sweep time (s)."""

    powers_dbm: tuple[float, ...]
    overload: bool
    sweep_time_s: float


class SpectrumAnalyzer(RoleDriver):
    """A swept spectrum analyzer reached through an analyzer dialect."""

    def __init__(self, instrument: ScpiInstrument):
        super().__init__(instrument)
        self.limits = instrument.dialect.limits
        self.performance = instrument.dialect.performance
        self._overload_bit = instrument.dialect.status["overload_bit"]
        # operation -> value last sent, so apply() and read_markers() skip unchanged settings
        self._sent: dict[str, float] = {}
        # The setup last applied, sent again by restore() after a reopened connection or a reset.
        self.last_setup: AnalyzerSetup | None = None
        # The sweep time first reported for each setup: its signature (see _settings_lost).
        self._sweep_time_by_setup: dict[AnalyzerSetup, float] = {}
        self._errors_deferred = False  # inside errors_read_once()
        # Detector and trace-averaging operations sent with prepare(), and the sweeps one read
        # then takes (instruments/detector_setup.py use_detector).
        self.detector_steps: list[tuple[str, dict]] = []
        self.sweeps_per_read = 1
        self._errors_every_read = True  # inside errors_read_once(on_every_read=False): only when asked
        instrument.add_restore_hook(self.restore)

    @contextlib.contextmanager
    def errors_read_once(self, on_every_read: bool = True):
        """Reads and settings inside leave the error queue alone; it is drained once at the end
        (one point's reads: an error there makes the point measured again, and the retry's
        restore sends every setting anew, so a refused one is not taken as in force).

        Where the dialect joins (one_line) each read line carries the error query anyway (no
        round trip of its own); on_every_read=False keeps it to a read asked for it
        (read_markers(errors_now=True), the caller's last). Anything sent after that read leaves
        the queue unchecked, so the drain at the end still reads it: an error is never missed,
        at worst it costs one round trip more."""
        self._errors_deferred, self._errors_every_read = True, on_every_read
        try:
            yield
        finally:
            self._errors_deferred, self._errors_every_read = False, True
        self.instrument.check_errors()

    def prepare(self) -> None:
        """Clear status and switch to single sweeps; the instrument state is then unknown."""
        self.forget_state()
        self.instrument.configure([("clear_status", {}), ("single_sweep_mode", {}), *self.detector_steps])

    def forget_state(self) -> None:
        """Send every setting again next time (e.g. after the analyzer may have lost them)."""
        self._sent.clear()

    def restore(self) -> None:
        """Single-sweep mode and every setting of the last setup sent again (the analyzer may have
        been reset or power-cycled); the next read sends its centre frequency again."""
        center_hz = self._sent.get("set_center")
        self.prepare()
        if self.last_setup is not None:
            self.apply(self.last_setup)
        if center_hz is not None:
            # One sweep, so that a marker query in flight when the state was lost has a trace
            # to read; the reading it belongs to is taken again (see read_markers).
            self._sweep(center_hz)

    def apply(self, setup: AnalyzerSetup) -> None:
        """Send the settings that changed since the last apply, then drain the error queue."""
        low, high = self.limits["min_atten_db"], self.limits["max_atten_db"]
        if not low <= setup.atten_db <= high:
            raise LimitError(
                f"{self.label}: attenuation {setup.atten_db:g} dB outside the "
                f"{self.instrument.dialect.name} range {low:g}..{high:g} dB"
            )
        self.last_setup = setup
        self._send_changed(
            [
                ("set_span", "span_hz", setup.span_hz),
                ("set_rbw", "rbw_hz", setup.rbw_hz),
                ("set_vbw", "vbw_hz", setup.vbw_hz),
                ("set_attenuation", "atten_db", setup.atten_db),
                ("set_ref_level", "ref_dbm", setup.ref_level_dbm),
            ]
        )

    def read_markers(self, center_hz: float, marker_freqs_hz: Sequence[float], errors_now: bool = False) -> MarkerReading:
        """One single sweep at `center_hz`, then the marker power (dBm) at each frequency (Hz).
        errors_now: the error query on this read's line (see errors_read_once)."""
        low, high = self.limits["min_freq_hz"], self.limits["max_freq_hz"]
        for freq_hz in (center_hz, *marker_freqs_hz):
            if not low <= freq_hz <= high:
                raise LimitError(
                    f"{self.label}: frequency {format_freq(freq_hz)} outside the "
                    f"{self.instrument.dialect.name} range {format_freq(low)} to {format_freq(high)}"
                )
        inst = self.instrument
        for _ in range(MAX_READ_ATTEMPTS):
            # A reading taken across a reopened connection may mix two traces: take it again.
            epoch = inst.epoch
            sweep_time_s = self._sweep(center_hz)
            if inst.epoch != epoch or self._settings_lost(sweep_time_s):
                continue
            # Status, markers and the sweep time asked again at the end (settings lost at any
            # moment of the read show there): one line where the dialect joins them. The error
            # queue's first entry rides on that line when it joins (no extra round trip; a
            # point's deferred drain then has nothing left to read), else only when not deferred.
            steps = [("read_status", {})]
            for freq_hz in marker_freqs_hz:
                steps += [("set_marker_freq", {"freq_hz": freq_hz}), ("read_marker_power", {})]
            errors = not self._errors_deferred or (inst.dialect.io.one_line and (self._errors_every_read or errors_now))
            tail = [("read_sweep_time", {}), *([("next_error", {})] if errors else [])]
            replies = inst.call_many([*steps, *tail])
            first_error = replies.pop() if errors else None
            status, *marker_dbm, sweep_time_after_s = replies
            overload = bool((status >> self._overload_bit) & 1)
            powers_dbm = [self.judge_marker_dbm(power_dbm, freq_hz) for power_dbm, freq_hz in zip(marker_dbm, marker_freqs_hz)]
            if errors:
                inst.check_errors(first_error)
            if inst.epoch == epoch and not self._settings_lost(sweep_time_after_s):
                return MarkerReading(tuple(powers_dbm), overload, sweep_time_s)
        raise InstrumentError(
            f"{self.label}: the connection was reopened or the settings lost during each of "
            f"{MAX_READ_ATTEMPTS} reads at {format_freq(center_hz)}"
        )

    def marker_bounds_dbm(self) -> tuple[float, float]:
        """(lowest, highest) marker reading (dBm) this analyzer can physically produce at its RBW."""
        rbw_hz = self.last_setup.rbw_hz if self.last_setup is not None else 1.0
        low_dbm = thermal_noise_dbm_per_hz() + 10.0 * math.log10(rbw_hz) - BELOW_THERMAL_DB
        return low_dbm, self.limits["damage_dbm"] + ABOVE_DAMAGE_DB

    def judge_marker_dbm(self, power_dbm: float, freq_hz: float) -> float:
        """The reading, or ImpossibleReading when no analyzer could have produced it."""
        low_dbm, high_dbm = self.marker_bounds_dbm()
        if low_dbm <= power_dbm <= high_dbm:
            return power_dbm
        why = (f"above the damage level {self.limits['damage_dbm']:g} dBm + {ABOVE_DAMAGE_DB:g} dB"
               if power_dbm > high_dbm else
               f"below thermal noise in the RBW - {BELOW_THERMAL_DB:g} dB ({low_dbm:.1f} dBm)")
        raise ImpossibleReading(f"{self.label}: impossible reading {power_dbm:.6g} dBm at {format_freq(freq_hz)}: {why}")

    def _settings_lost(self, sweep_time_s: float) -> bool:
        """True (after restoring them) when the analyzer's sweep time shows other settings.

        The sweep time follows span and RBW, so the value first reported for a setup is its
        signature: a different one later means the analyzer was reset or power-cycled behind our
        back. No extra query is needed; the sweep time is read for every sweep anyway.
        """
        setup = self.last_setup
        if setup is None:
            return False
        expected_s = self._sweep_time_by_setup.setdefault(setup, sweep_time_s)
        if abs(sweep_time_s - expected_s) <= SWEEP_TIME_TOLERANCE * expected_s:
            return False
        message = (f"{self.label}: sweep time {sweep_time_s:.6g} s where {expected_s:.6g} s was reported "
                   "for these settings: settings lost (reset?); sent again")
        supervision = self.instrument.supervision
        if supervision is not None:
            supervision.emit(self.label, "state-lost", "warning", message)
        # Seeded again after the restore, in case the first value was the wrong one.
        self._sweep_time_by_setup.pop(setup, None)
        self.restore()
        return True

    def _sweep(self, center_hz: float) -> float:
        """One single sweep at `center_hz` (Hz), waited for; returns the sweep time (s)."""
        inst = self.instrument
        # Known for this setup after its first sweep (the sweep time follows span and RBW); the
        # query after every read (read_markers) still tells a lost setup.
        sweep_time_s = self._sweep_time_by_setup.get(self.last_setup) if self.last_setup is not None else None
        if sweep_time_s is None:
            self._send_changed([("set_center", "freq_hz", center_hz)], drain=False)
            sweep_time_s = inst.call("read_sweep_time")
        # The centre (when it changed), the sweep and the wait for it: one line where the dialect joins them.
        self._send_changed([("set_center", "freq_hz", center_hz)], drain=False,
                           then=[("start_sweep", {}), ("wait_complete", {})],
                           timeout_s=2 * sweep_time_s * self.sweeps_per_read + inst.dialect.io.query_timeout_s)
        return sweep_time_s

    def predicted_sweep_time_s(self, setup: AnalyzerSetup) -> float:
        """The time one read of `setup` sweeps, by sweep_time_model_s (k from the dialect or bench
        file), times the sweeps of a trace average (sweeps_per_read)."""
        return self.sweeps_per_read * sweep_time_model_s(self.performance["sweep_time_factor"], setup.span_hz,
                                                         setup.rbw_hz, setup.vbw_hz)

    def _send_changed(self, steps: list[tuple[str, str, float]], drain: bool = True,
                      then: list[tuple[str, dict]] = (), timeout_s: float | None = None) -> None:
        """The settings of `steps` that changed, then the operations `then` (on one line where
        the dialect joins them; a wait_complete in them waits up to timeout_s)."""
        try:
            changed = [(operation, field, value) for operation, field, value in steps
                       if self._sent.get(operation) != value]
            for operation, _, _ in changed:
                self._sent.pop(operation, None)  # if the write fails the instrument's value is unknown
            ops = [*((op, {field: value}) for op, field, value in changed), *then]
            if drain and not self._errors_deferred:  # the errors on the same line where it joins
                replies = self.instrument.call_many_checked(ops, timeout_s)
            else:
                replies = self.instrument.call_many(ops, timeout_s)
            self._sent.update((operation, value) for operation, _, value in changed)
            if any(op == "wait_complete" for op, _ in then) and replies[-1] != 1:
                raise InstrumentError(f"{self.label}: wait_complete replied {replies[-1]}; expected 1")
        except Exception:
            # A rejected setting leaves the instrument in an unknown state; send all next time.
            self.forget_state()
            raise
