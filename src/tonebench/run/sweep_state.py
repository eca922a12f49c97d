"""What the sequencer keeps per sweep (all points that differ only in tone power), in one object
keyed by the planned point's sweep key: the leveling reference, which tone powers get the
attenuation-step check, and the tone readings of the sweep's last two accepted points."""

from __future__ import annotations

from dataclasses import dataclass, field

from tonebench.plan.axes import SweepKey
from tonebench.plan.points import PlannedPoint


@dataclass
class SweepState:
    top_dbm: float  # the sweep's highest tone power: both tones are leveled there
    step_levels_dbm: frozenset[float]  # tone powers whose IM3 is read again with more attenuation
    # (f1 dBm, f2 dBm, tone_dbm) of the last two accepted points, oldest first (raw readings)
    accepted: list[tuple[float, float, float]] = field(default_factory=list)

    def accept(self, f1_dbm: float, f2_dbm: float, tone_dbm: float) -> None:
        self.accepted[:] = [*self.accepted[-1:], (f1_dbm, f2_dbm, tone_dbm)]

    def expected_tones_dbm(self, tone_dbm: float) -> tuple[float, float] | None:
        """Tone readings (f1, f2 dBm) expected at tone_dbm on the line through the last two
        accepted points (slope 1 through the last one when there is only one); None before any."""
        if not self.accepted:
            return None
        f1_dbm, f2_dbm, last_dbm = self.accepted[-1]
        slopes = (1.0, 1.0)
        if len(self.accepted) == 2 and self.accepted[0][2] != last_dbm:
            before = self.accepted[0]
            slopes = ((f1_dbm - before[0]) / (last_dbm - before[2]), (f2_dbm - before[1]) / (last_dbm - before[2]))
        step_db = tone_dbm - last_dbm
        return f1_dbm + slopes[0] * step_db, f2_dbm + slopes[1] * step_db

    def predicted_tone_dbm(self, tone_dbm: float) -> float | None:
        """Tone level at the analyzer input (mean of both, dBm) expected at tone_dbm: slope 1 from
        the last accepted point; None before any."""
        if not self.accepted:
            return None
        f1_dbm, f2_dbm, last_dbm = self.accepted[-1]
        return (f1_dbm + f2_dbm) / 2.0 + tone_dbm - last_dbm


def sweep_states(points: list[PlannedPoint], step_top_points: int) -> dict[SweepKey, SweepState]:
    """A fresh state for every sweep of the plan; the step check goes to each sweep's
    `step_top_points` highest tone powers."""
    levels: dict[SweepKey, set[float]] = {}
    for point in points:
        levels.setdefault(point.sweep_key, set()).add(point.tone_dbm)
    return {key: SweepState(max(values), frozenset(sorted(values)[-step_top_points:]) if step_top_points else frozenset())
            for key, values in levels.items()}
