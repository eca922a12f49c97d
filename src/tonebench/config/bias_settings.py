"""The plan's gate bias: `[bias]` (gate voltages or a drain-current target, the drain voltage),
its DC transfer sweep `[bias.dc]` and the sweet-spot search `[bias.search]`."""

from __future__ import annotations

import math

from pydantic import Field, model_validator

from tonebench.config.loading import StrictModel

# Tone power at the DUT input plane that any plan may ask for; the bench file narrows it further.
TONE_MIN_DBM = -150.0
TONE_MAX_DBM = 30.0
GATE_LIMIT_V = 20.0  # any plan; the bench file's [bias] narrows it


class DcSweepSettings(StrictModel):
    """`[bias.dc]`: the DC transfer sweep of `tonebench bias` (drain current against gate voltage)
    and the Savitzky-Golay window its g1..g3 are derived with."""

    gate_start_v: float = Field(ge=-GATE_LIMIT_V, le=GATE_LIMIT_V)
    gate_stop_v: float = Field(ge=-GATE_LIMIT_V, le=GATE_LIMIT_V)
    gate_step_v: float = Field(gt=0.0, le=1.0)
    # 81 points at a 1 mV step: a third derivative needs a wide window against the reading noise
    # (with 0.2 uA of noise, 41 points at 1 mV leave g3 crossing zero several times; measured on the
    # simulated TBF-77, see tests/analysis/test_bias_search.py).
    window_points: int = Field(default=81, ge=7, le=501)
    polyorder: int = Field(default=5, ge=4, le=9)
    noise_readings: int = Field(default=16, ge=4, le=1000, description="repeat readings that measure the current noise")

    @model_validator(mode="after")
    def _enough(self) -> "DcSweepSettings":
        if self.gate_stop_v <= self.gate_start_v:
            raise ValueError("[bias.dc] gate_stop_v must be above gate_start_v")
        if self.window_points % 2 == 0 or self.window_points <= self.polyorder:
            raise ValueError("[bias.dc] window_points must be odd and larger than polyorder")
        if self.gate_count() < self.window_points + 2:
            raise ValueError(f"[bias.dc] {self.gate_count()} gate voltages; needs more than window_points "
                             f"({self.window_points}) to leave interior points")
        return self

    def gate_count(self) -> int:
        return int(math.floor((self.gate_stop_v - self.gate_start_v) / self.gate_step_v + 1e-9)) + 1

    def gate_voltages_v(self) -> list[float]:
        return [round(self.gate_start_v + i * self.gate_step_v, 9) for i in range(self.gate_count())]


class BiasSearchSettings(StrictModel):
    """`[bias.search]`: the two-tone search for the sweet spot. The coarse steps are the [bias]
    gate voltages; fine steps follow around the measured IIP3 peak. Near the g3 zero fifth-order
    terms dominate, so the measured IIP3 depends on drive: it is read at drive_tone_dbm."""

    drive_tone_dbm: float = Field(ge=TONE_MIN_DBM, le=TONE_MAX_DBM)
    fine_step_v: float = Field(gt=0.0, le=1.0)
    fine_points: int = Field(default=7, ge=3, le=101)
    # The window: IIP3 at or above window_threshold_dbm (a spec limit), or the peak less window_below_peak_db.
    window_threshold_dbm: float | None = Field(default=None, ge=-100.0, le=100.0)
    window_below_peak_db: float | None = Field(default=None, gt=0.0, le=60.0)

    @model_validator(mode="after")
    def _one_window(self) -> "BiasSearchSettings":
        if (self.window_threshold_dbm is None) == (self.window_below_peak_db is None):
            raise ValueError("[bias.search] give exactly one of window_threshold_dbm and window_below_peak_db")
        return self


class BiasSettings(StrictModel):
    """`[bias]`: the gate voltages to measure at (a list, or a range) and the drain voltage held;
    optionally the DC sweep and the two-tone search of `tonebench bias`."""

    gate_v: list[float] | None = Field(default=None, min_length=1)
    # Instead of gate voltages: the drain current to bias at. The gate voltage that gives it is
    # searched at the start of the run (RF off) within the bench file's gate_min_v..gate_max_v.
    drain_current_a: float | None = Field(default=None, gt=0.0, le=10.0)
    gate_start_v: float | None = Field(default=None, ge=-GATE_LIMIT_V, le=GATE_LIMIT_V)
    gate_stop_v: float | None = Field(default=None, ge=-GATE_LIMIT_V, le=GATE_LIMIT_V)
    gate_step_v: float | None = Field(default=None, gt=0.0, le=GATE_LIMIT_V)
    # None: the bench file's [bias] drain_v.
    drain_v: float | None = Field(default=None, ge=0.0, le=60.0)
    dc: DcSweepSettings | None = None
    search: BiasSearchSettings | None = None

    @model_validator(mode="after")
    def _one_form(self) -> "BiasSettings":
        range_given = [name for name in ("gate_start_v", "gate_stop_v", "gate_step_v") if getattr(self, name) is not None]
        forms = "either gate_v = [volts, ...], or gate_start_v, gate_stop_v and gate_step_v, or drain_current_a"
        if self.drain_current_a is not None:
            if self.gate_v is not None or range_given or self.dc is not None or self.search is not None:
                raise ValueError(f"drain_current_a is given with gate voltages or a [bias.dc]/[bias.search] table; "
                                 f"use {forms}")
            return self
        if self.gate_v is not None and range_given:
            raise ValueError(f"gate_v and {', '.join(range_given)} both given; use {forms}")
        if self.gate_v is None and len(range_given) != 3:
            raise ValueError(f"gate voltages missing or incomplete; give {forms}")
        if self.gate_v is not None and any(abs(v) > GATE_LIMIT_V for v in self.gate_v):
            raise ValueError(f"gate_v values must lie within +/-{GATE_LIMIT_V:g} V")
        if self.gate_v is None and self.gate_stop_v < self.gate_start_v:
            raise ValueError("gate_stop_v must not be below gate_start_v")
        return self

    def gate_count(self) -> int:
        if self.drain_current_a is not None:
            return 1
        if self.gate_v is not None:
            return len(self.gate_v)
        return int(math.floor((self.gate_stop_v - self.gate_start_v) / self.gate_step_v + 1e-9)) + 1

    def gate_voltages_v(self) -> list[float] | None:
        """The gate voltages of the bias axis; None with a drain-current target (no axis: the
        gate voltage is found on the bench, and stored with every point as read back)."""
        if self.drain_current_a is not None:
            return None
        if self.gate_v is not None:
            return [round(v, 6) for v in self.gate_v]
        return [round(self.gate_start_v + i * self.gate_step_v, 6) for i in range(self.gate_count())]
