"""A FET's bias: the gate and drain supplies together, within the bench file's [bias] limits,
brought up and down in the order that is safe for enhancement and depletion parts alike.

Up: gate on at gate_idle_v (pinch-off for a depletion part), drain ramped from 0 V, then the
gate ramped to its point. Down: gate ramped back to gate_idle_v, drain ramped to 0 V and off,
gate off last. No step is larger than ramp_step_v, and steps come no faster than ramp_v_per_s.
A tripped output is a fault (SupplyTripped), never a reading of zero bias.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

from tonebench.config.bench_file import BiasLimits
from tonebench.errors import InputError, InstrumentError
from tonebench.instruments.rf_guard import shielded
from tonebench.instruments.supply import DcSupply
from tonebench.plan.limits import check_bias_voltages


@dataclass(frozen=True)
class BiasReading:
    """What both supplies read back at one point (V, A)."""

    gate_read_v: float
    gate_current_a: float
    drain_read_v: float
    drain_current_a: float


class BiasTargetMissed(InstrumentError):
    """No gate voltage within the bench file's limits gives the drain current asked for."""


# A drain-current target is met within this fraction of it; the search stops at this gate step.
TARGET_TOLERANCE = 0.01
TARGET_RESOLUTION_V = 1e-4


class BiasSupplies:
    """The gate and drain outputs of one bench under its [bias] limits. `sleep` is injectable so
    tests can count the ramp's waits instead of spending them."""

    def __init__(self, gate: DcSupply, drain: DcSupply, limits: BiasLimits,
                 sleep: Callable[[float], None] = time.sleep):
        self.gate = gate
        self.drain = drain
        self.limits = limits
        self.sleep = sleep
        self.gate_v = 0.0  # as last set
        self.drain_v = 0.0
        self.up = False
        # The run's thread and the watchdog's may both bring the bias down: one does, once.
        self._down_lock = threading.Lock()

    def supplies(self) -> tuple[DcSupply, DcSupply]:
        return self.gate, self.drain

    def check_limits(self) -> None:
        """The current limits and voltages of [bias] against each supply dialect's ranges."""
        for supply, current_a, high_v, low_v in (
            (self.gate, self.limits.gate_current_limit_a, self.limits.gate_max_v, self.limits.gate_min_v),
            (self.drain, self.limits.drain_current_limit_a, self.limits.drain_max_v, 0.0),
        ):
            if not supply.min_current_a <= current_a <= supply.max_current_a:
                raise InputError(f"[bias]: current limit {current_a:g} A for {supply.label} outside its dialect's "
                                 f"{supply.min_current_a:g}..{supply.max_current_a:g} A")
            if low_v < supply.min_voltage_v or high_v > supply.max_voltage_v:
                raise InputError(f"[bias]: {supply.label} voltages {low_v:g}..{high_v:g} V outside its dialect's "
                                 f"{supply.min_voltage_v:g}..{supply.max_voltage_v:g} V")

    def bias_up(self, gate_v: float, drain_v: float | None = None) -> None:
        """Gate on at idle, drain ramped to drain_v (the bench file's when None), gate to gate_v."""
        check_bias_voltages(self.limits, [gate_v], drain_v, "bias")
        drain_v = self.limits.drain_v if drain_v is None else drain_v
        for supply, current_a in ((self.gate, self.limits.gate_current_limit_a),
                                  (self.drain, self.limits.drain_current_limit_a)):
            supply.prepare()
            supply.set_current_limit(current_a)
        self.gate.set_voltage(self.limits.gate_idle_v)
        self.drain.set_voltage(0.0)
        self.gate_v, self.drain_v = self.limits.gate_idle_v, 0.0
        self.up = True  # from here on, bias_down has something to switch off
        self.gate.output_on()
        self.drain.output_on()
        self.drain_v = self._ramp(self.drain, self.drain_v, drain_v)
        self.set_gate(gate_v)

    def set_gate(self, gate_v: float) -> None:
        """Ramp the gate to gate_v (within [bias]) and wait settle_s."""
        check_bias_voltages(self.limits, [gate_v], None, "bias")
        self.gate_v = self._ramp(self.gate, self.gate_v, gate_v)
        self.sleep(self.limits.settle_s)

    def find_gate_for_current(self, target_a: float, on_step: Callable[[], None] = lambda: None) -> tuple[float, float, int]:
        """With the bias up: the gate voltage, by bisection within gate_min_v..gate_max_v, at
        which the drain reads target_a within TARGET_TOLERANCE (drain current rising with gate
        voltage, as in an n-channel FET). Every step ramps and settles like any gate change and
        only visits midpoints, never the limits themselves. Returns (gate_v, drain_a, steps);
        BiasTargetMissed when the target lies outside what the limits allow."""
        low_v, high_v = self.limits.gate_min_v, self.limits.gate_max_v
        steps = 0
        while True:
            gate_v = round((low_v + high_v) / 2.0, 6)
            self.set_gate(gate_v)
            drain_a = self.drain.measure_current_a()
            steps += 1
            on_step()
            if abs(drain_a - target_a) <= TARGET_TOLERANCE * target_a:
                return gate_v, drain_a, steps
            low_v, high_v = (gate_v, high_v) if drain_a < target_a else (low_v, gate_v)
            if high_v - low_v < TARGET_RESOLUTION_V:
                raise BiasTargetMissed(
                    f"bias: no gate voltage within {self.limits.gate_min_v:g}..{self.limits.gate_max_v:g} V gives "
                    f"{target_a * 1e3:g} mA (within {TARGET_TOLERANCE:.0%}); {drain_a * 1e3:.4g} mA at {gate_v:.4f} V")

    def read(self) -> BiasReading:
        """Both supplies' voltage and current; SupplyTripped if either output has tripped."""
        # One trip check per supply after both its readings (not one per reading).
        return BiasReading(*self.gate.measure(), *self.drain.measure())

    def bias_down(self) -> list[str]:
        """Gate to idle, drain ramped down and off, gate off: every step tried even when one fails
        (a signal meanwhile is deferred). Returns a line per failure; empty when all is off."""
        failures: list[str] = []
        with shielded():
            steps = (
                (self.gate, lambda: setattr(self, "gate_v", self._ramp(self.gate, self.gate_v, self.limits.gate_idle_v))),
                (self.drain, lambda: setattr(self, "drain_v", self._ramp(self.drain, self.drain_v, 0.0))),
                (self.drain, self.drain.output_off),
                (self.gate, self.gate.output_off),
            )
            for supply, step in steps:
                try:
                    step()
                except Exception as exc:  # noqa: BLE001 - the other steps must still be tried
                    failures.append(f"{supply.label}: {exc}")
        self.up = False
        return failures

    def bias_down_if_up(self, lock_wait_s: float | None = None) -> list[str] | None:
        """bias_down once, from whichever thread comes first (the other finds it done: []).
        With lock_wait_s (the watchdog, while the run's thread may be stuck in a call), each
        supply's connection is waited for at most that long; None when one stayed busy, so the
        bias is left to the run's own ending rather than sent over a connection in use."""
        with self._down_lock:
            if not self.up:
                return []
            if lock_wait_s is None:
                return self.bias_down()
            held = []
            try:
                for lock in {id(s.instrument.io_lock): s.instrument.io_lock for s in self.supplies()}.values():
                    if not lock.acquire(timeout=lock_wait_s):
                        return None
                    held.append(lock)
                return self.bias_down()
            finally:
                for lock in held:
                    lock.release()

    def _ramp(self, supply: DcSupply, from_v: float, to_v: float) -> float:
        """Move supply from from_v to to_v in steps of at most ramp_step_v at ramp_v_per_s."""
        if to_v == from_v:
            return to_v
        steps = max(1, math.ceil(abs(to_v - from_v) / self.limits.ramp_step_v - 1e-9))
        dwell_s = abs(to_v - from_v) / steps / self.limits.ramp_v_per_s
        for index in range(1, steps + 1):
            supply.set_voltage(from_v + (to_v - from_v) * index / steps)
            if index < steps:
                self.sleep(dwell_s)
        return to_v
