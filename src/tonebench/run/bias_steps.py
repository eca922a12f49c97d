"""The conditions a run holds its device at besides the tones: gate and drain bias (up before RF,
down after it, in its safe order; a tripped supply stops the run) and the chamber temperature
(a soak with RF off, kicking the watchdog at every reading)."""

from __future__ import annotations

import contextlib
from collections.abc import Callable

from tonebench.instruments.bias import BiasTargetMissed
from tonebench.instruments.chamber import ChamberSoakTimeout
from tonebench.instruments.open_bench import OpenBench
from tonebench.instruments.supply import SupplyTripped
from tonebench.plan.points import PlannedPoint
from tonebench.run.rf_switches import RfSwitches
from tonebench.run.stopped import RunStopped


class BenchConditions:
    """Bias and temperature for the sequencer. kick and check_stop keep the watchdog fed and a
    stop request heard during long waits (a soak, a search for the gate voltage)."""

    def __init__(self, bench: OpenBench, rf: RfSwitches, log, kick: Callable[[], None],
                 check_stop: Callable[[], None], drain_v: float | None, target_drain_a: float | None,
                 held_at_c: float | None):
        self._bench, self._rf, self._log = bench, rf, log
        self._kick, self._check_stop = kick, check_stop
        self._drain_v = drain_v
        self._target_drain_a = target_drain_a
        self._held_at_c = held_at_c
        self._soaked_c: float | None = None  # the temperature soaked at, this run

    def set_temperature(self, point: PlannedPoint) -> None:
        """A new chamber temperature: RF off, then a soak (kicking the watchdog at every reading);
        a soak that never settles ends the run (aborted), it is not waited out."""
        chamber = self._bench.chamber
        if point.temperature_c is None or chamber is None or self._soaked_c == point.temperature_c:
            return
        self._rf.set(False, False)
        limits = chamber.limits
        if point.temperature_c == self._held_at_c:
            chamber.set_point(point.temperature_c)
            read_c = chamber.temperature_c()
            if abs(read_c - point.temperature_c) <= limits.tolerance_c:
                self._soaked_c = point.temperature_c
                self._log.event("info", "soak-held", f"{chamber.label}: held at {point.temperature_c:g} degC since the "
                                                     f"last soak, reads {read_c:.2f} degC: no second dwell")
                return
        self._log.event("info", "soak-start", f"{chamber.label}: soaking at {point.temperature_c:g} degC "
                                              f"(within {limits.tolerance_c:g} degC for {limits.dwell_s:g} s, RF off)")
        try:
            soaked = chamber.soak(point.temperature_c, lambda read_c, waited_s: (self._kick(), self._check_stop()))
        except ChamberSoakTimeout as exc:
            self._log.event("error", "soak-timeout", str(exc))
            raise RunStopped("aborted", str(exc)) from None
        self._soaked_c = point.temperature_c
        self._log.event("info", "soak-done", f"{chamber.label}: {soaked.read_c:.2f} degC after {soaked.waited_s:.0f} s")

    def bias_up(self, todo: list[PlannedPoint]) -> None:
        """Bias on at the first point's gate voltage (or, for a drain-current target, at the
        gate that gives it), before RF ever goes on."""
        bias = self._bench.bias
        first_v = next((point.bias_v for point in todo if point.bias_v is not None), None)
        if bias is None or (first_v is None and self._target_drain_a is None):
            return
        start_v = first_v if first_v is not None else bias.limits.gate_idle_v
        with self._trips_stop_the_run("bias on"):
            bias.bias_up(start_v, self._drain_v)
        self._log.event("info", "bias-on", f"bias on: gate {start_v:g} V, drain {bias.drain_v:g} V "
                                           f"(gate first, drain ramped at {bias.limits.ramp_v_per_s:g} V/s)")
        if first_v is None:
            self._find_target_gate(bias)

    def _find_target_gate(self, bias) -> None:
        target_a = self._target_drain_a
        with self._trips_stop_the_run("bias target"):
            try:
                gate_v, drain_a, steps = bias.find_gate_for_current(target_a, lambda: (self._kick(), self._check_stop()))
            except BiasTargetMissed as exc:
                self._log.event("error", "bias-target-missed", str(exc))
                raise RunStopped("aborted", str(exc)) from None
        self._log.event("info", "bias-target", f"bias: gate {gate_v:.4f} V gives {drain_a * 1e3:.4g} mA "
                                               f"(target {target_a * 1e3:g} mA, {steps} steps, RF off)")

    def bias_down(self) -> None:
        bias = self._bench.bias
        if bias is None or not bias.up:
            return
        failures = self._bench.switch_bias_off()
        try:
            if failures:
                self._log.event("error", "bias-not-off", "bias off failed: " + "; ".join(failures))
            else:
                self._log.event("info", "bias-off", "bias off (gate to idle, drain down and off, gate off)")
        except Exception:  # noqa: BLE001 - the run's end is still recorded by the runner
            pass

    def set_bias(self, point: PlannedPoint) -> None:
        bias = self._bench.bias
        if bias is not None and point.bias_v is not None and bias.gate_v != point.bias_v:
            with self._trips_stop_the_run(f"point {point.name}"):
                bias.set_gate(point.bias_v)

    def read_bias(self, point: PlannedPoint):
        bias = self._bench.bias
        if bias is None or not bias.up:
            return None
        with self._trips_stop_the_run(f"point {point.name}"):
            return bias.read()

    @contextlib.contextmanager
    def _trips_stop_the_run(self, where: str):
        """A tripped bias supply is a fault that ends the run (aborted, RF and bias off), never a
        reading of zero bias, and never retried (the device may be damaged)."""
        try:
            yield
        except SupplyTripped as exc:
            self._log.event("error", "bias-tripped", f"{where}: {exc}")
            raise RunStopped("aborted", f"bias supply tripped at {where}: {exc}") from None
