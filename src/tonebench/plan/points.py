"""Expand a plan into the ordered list of points, each with a stable key.

The same list drives dry runs, limit checks, progress and (later) resume, so the key depends only
on what the point measures, never on when or where it ran.
"""

from __future__ import annotations

from dataclasses import dataclass

from tonebench.config.plan_file import PlanFile


@dataclass(frozen=True)
class PlannedPoint:
    seq: int
    center_hz: float
    spacing_hz: float
    tone_dbm: float
    bias_v: float | None = None

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

    @property
    def key(self) -> str:
        bias = "" if self.bias_v is None else f"/b{self.bias_v:+.4f}V"
        return f"c{self.center_hz:.0f}/d{self.spacing_hz:.0f}/p{self.tone_dbm:+.2f}{bias}"


def expand(plan: PlanFile) -> list[PlannedPoint]:
    """Points ordered by frequency, then spacing, then rising tone power (a sweep per group)."""
    points = []
    for center_hz in plan.sweep.center_freqs_hz:
        for spacing_hz in plan.sweep.spacings_hz:
            for tone_dbm in plan.sweep.tone_levels_dbm():
                points.append(PlannedPoint(len(points), center_hz, spacing_hz, tone_dbm))
    return points
