"""Thermal chamber role driver: set point, the chamber's temperature, and the soak.

A soak is done when the chamber reads within tolerance_c of the set point continuously for
dwell_s; leaving the band starts the dwell again. A soak that has not finished after timeout_s is
a fault (ChamberSoakTimeout), never an endless wait. `clock` and `sleep` are the driver's time:
wall time on hardware, the simulator's virtual clock on a simulated bench (so a 20-minute soak
takes no real time there).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

from tonebench.config.bench_file import ChamberLimits
from tonebench.errors import InstrumentError
from tonebench.instruments.scpi import LimitError, RoleDriver, ScpiInstrument


class ChamberSoakTimeout(InstrumentError):
    """The chamber did not hold the set point within tolerance for the dwell before the timeout."""


@dataclass(frozen=True)
class SoakResult:
    set_c: float
    read_c: float  # the last reading, within tolerance
    waited_s: float


class Chamber(RoleDriver):
    """The chamber of a bench under its [chamber] limits (what a soak is)."""

    def __init__(self, instrument: ScpiInstrument, limits: ChamberLimits, clock: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], None] = time.sleep):
        super().__init__(instrument)
        self.limits = limits
        limits = instrument.dialect.limits
        self.min_temp_c = limits["min_temp_c"]
        self.max_temp_c = limits["max_temp_c"]
        self.clock = clock
        self.sleep = sleep
        self.wanted_c: float | None = None  # the last set point asked for
        instrument.add_restore_hook(self.restore)

    def _wait_s(self) -> float:
        return self.instrument.dialect.io.query_timeout_s

    def set_point(self, temp_c: float) -> None:
        """Set point (degC) within the bench file's and the dialect's range; conditioning on."""
        if not self.limits.min_c <= temp_c <= self.limits.max_c:
            raise LimitError(f"{self.label}: set point {temp_c:g} degC outside the bench file's [chamber] "
                             f"min_c..max_c ({self.limits.min_c:g}..{self.limits.max_c:g} degC)")
        if not self.min_temp_c <= temp_c <= self.max_temp_c:
            raise LimitError(f"{self.label}: set point {temp_c:g} degC outside the {self.instrument.dialect.name} "
                             f"range {self.min_temp_c:g}..{self.max_temp_c:g} degC (min_temp_c/max_temp_c)")
        self.wanted_c = temp_c
        self.instrument.configure([("set_temperature", {"temp_c": temp_c}), ("conditioning_on", {})],
                                  wait_s=self._wait_s())

    def temperature_c(self) -> float:
        """The chamber's own temperature reading (degC)."""
        return self.instrument.call("measure_temperature")

    def soak(self, temp_c: float, on_wait: Callable[[float, float], None] | None = None) -> SoakResult:
        """Set temp_c and wait until the reading holds within tolerance for the dwell.
        on_wait(reading degC, waited s) is called at every poll (progress, stop checks)."""
        settings = self.limits
        self.set_point(temp_c)
        started_s = self.clock()
        in_band_since_s = None
        while True:
            now_s = self.clock()
            read_c = self.temperature_c()
            waited_s = now_s - started_s
            if abs(read_c - temp_c) <= settings.tolerance_c:
                in_band_since_s = now_s if in_band_since_s is None else in_band_since_s
                if now_s - in_band_since_s >= settings.dwell_s:
                    return SoakResult(temp_c, read_c, waited_s)
            else:
                in_band_since_s = None
            if waited_s >= settings.timeout_s:
                raise ChamberSoakTimeout(
                    f"{self.label}: no soak at {temp_c:g} degC after {waited_s:.0f} s: reads {read_c:.2f} degC, "
                    f"needs {settings.dwell_s:g} s within {settings.tolerance_c:g} degC (timeout_s {settings.timeout_s:g})")
            if on_wait is not None:
                on_wait(read_c, waited_s)
            self.sleep(settings.poll_s)

    def restore(self) -> None:
        """After a reopened connection: the set point again (conditioning on)."""
        if self.wanted_c is not None:
            self.instrument.configure([("set_temperature", {"temp_c": self.wanted_c}), ("conditioning_on", {})],
                                      wait_s=self._wait_s())
