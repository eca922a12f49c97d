"""Expand a plan into the ordered list of points, each with a stable key.

The same list drives dry runs, limit checks, progress and (later) resume, so the key depends only
on what the point measures, never on when or where it ran. The axes, their key parts and their
order are declared once, in plan/axes.py.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from itertools import product

from tonebench.config.plan_file import PlanFile
from tonebench.plan.axes import AXES, SweepKey, axis_values, point_key_of, point_name, sweep_key_of


@dataclass(frozen=True)
class PlannedPoint:
    seq: int
    center_hz: float
    spacing_hz: float
    tone_dbm: float
    bias_v: float | None = None
    temperature_c: float | None = None  # chamber set point
    lo_dbm: float | None = None  # LO power stepped by the plan ([mixer] lo_levels_dbm), at the LO connector

    @property
    def f1_hz(self) -> float:
        return self.center_hz - self.spacing_hz / 2.0

    @property
    def f2_hz(self) -> float:
        return self.center_hz + self.spacing_hz / 2.0

    @property
    def lower_hz(self) -> float:
        """The lower third-order product, 2f1 - f2."""
        return 2.0 * self.f1_hz - self.f2_hz

    @property
    def upper_hz(self) -> float:
        """The upper third-order product, 2f2 - f1."""
        return 2.0 * self.f2_hz - self.f1_hz

    # Kept once computed (the fields are frozen): the sequencer asks for both several times a point.
    @cached_property
    def key(self) -> str:
        return point_key_of({axis.point_field: getattr(self, axis.point_field) for axis in AXES})

    @property
    def name(self) -> str:
        """The point as messages name it, e.g. '2.45 GHz, spacing 1 MHz, -20.00 dBm per tone'."""
        return point_name({axis.point_field: getattr(self, axis.point_field) for axis in AXES})

    @cached_property
    def sweep_key(self) -> SweepKey:
        """The sweep this point belongs to: every axis but tone power (plan/axes.py)."""
        return sweep_key_of(self)


def expand(plan: PlanFile) -> list[PlannedPoint]:
    """Points over every axis in plan/axes.py order (today frequency, then spacing), the tone
    power rising innermost: one sweep per group."""
    pairs = axis_values(plan)
    fields = [axis.point_field for axis, _ in pairs]
    points = []
    for values in product(*(values for _, values in pairs)):
        points.append(PlannedPoint(len(points), **dict(zip(fields, values))))
    return points
