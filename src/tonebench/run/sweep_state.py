"""What the sequencer keeps per sweep (all points that differ only in tone power), in one object
keyed by the planned point's sweep key: the leveling reference, which tone powers get the
attenuation-step check, and the tone readings of the sweep's last three accepted points."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from tonebench.analysis.sweep_fit import NOISE_CORRECT_MIN_DB
from tonebench.plan.axes import SweepKey
from tonebench.plan.points import PlannedPoint


@dataclass
class SweepState:
    top_dbm: float  # the sweep's highest tone power: both tones are leveled there
    step_levels_dbm: frozenset[float]  # tone powers whose IM3 is read again with more attenuation
    # (f1 dBm, f2 dBm, tone_dbm) of the last three accepted points, oldest first (raw readings)
    accepted: list[tuple[float, float, float]] = field(default_factory=list)
    # (weaker IM3 product dBm with its noise removed, noise density dBm/Hz, tone_dbm) of the last
    # accepted point whose products cleared their noise (the accuracy target's prediction)
    last_product: tuple[float, float, float] | None = None

    def accept(self, f1_dbm: float, f2_dbm: float, tone_dbm: float) -> None:
        self.accepted[:] = [*self.accepted[-2:], (f1_dbm, f2_dbm, tone_dbm)]

    def accept_products(self, lower_dbm: float, upper_dbm: float, noise_lower_dbm: float, noise_upper_dbm: float,
                        rbw_hz: float, tone_dbm: float) -> None:
        """Remember the weaker product (noise removed) and the noise density beside it; a product
        under NOISE_CORRECT_MIN_DB over its noise says only where it is not, and is passed over."""
        snr_db = min(lower_dbm - noise_lower_dbm, upper_dbm - noise_upper_dbm)
        if not snr_db > NOISE_CORRECT_MIN_DB:
            return
        weaker_dbm, noise_dbm = min((lower_dbm, noise_lower_dbm), (upper_dbm, noise_upper_dbm))
        corrected_dbm = weaker_dbm + 10.0 * math.log10(1.0 - 10.0 ** (-(weaker_dbm - noise_dbm) / 10.0))
        density_dbm_per_hz = max(noise_lower_dbm, noise_upper_dbm) - 10.0 * math.log10(rbw_hz)
        self.last_product = (corrected_dbm, density_dbm_per_hz, tone_dbm)

    def predicted_product(self, tone_dbm: float) -> tuple[float, float] | None:
        """(weaker IM3 product dBm, noise density dBm/Hz) expected at tone_dbm: slope 3 from the
        last remembered point; None before any."""
        if self.last_product is None:
            return None
        product_dbm, density_dbm_per_hz, last_dbm = self.last_product
        return product_dbm + 3.0 * (tone_dbm - last_dbm), density_dbm_per_hz

    def expected_tones_dbm(self, tone_dbm: float) -> tuple[float, float] | None:
        """Tone readings (f1, f2 dBm) expected at tone_dbm: on the parabola through the last three
        accepted points (it follows the bend of compression, where a line would call every point
        unsettled), the line through the last two, or slope 1 through the only one; None before any."""
        if not self.accepted:
            return None
        tones = [tone for _f1, _f2, tone in self.accepted]
        if len(set(tones)) < len(tones):  # a repeated tone power: no curve through them
            tones, used = tones[-1:], self.accepted[-1:]
        else:
            used = self.accepted
        if len(used) == 1:
            f1_dbm, f2_dbm, last_dbm = used[0]
            return f1_dbm + tone_dbm - last_dbm, f2_dbm + tone_dbm - last_dbm
        return tuple(_lagrange(tones, [reading[index] for reading in used], tone_dbm) for index in (0, 1))

    def predicted_tone_dbm(self, tone_dbm: float) -> float | None:
        """Tone level at the analyzer input (mean of both, dBm) expected at tone_dbm: slope 1 from
        the last accepted point; None before any."""
        if not self.accepted:
            return None
        f1_dbm, f2_dbm, last_dbm = self.accepted[-1]
        return (f1_dbm + f2_dbm) / 2.0 + tone_dbm - last_dbm


def _lagrange(xs: list[float], ys: list[float], x: float) -> float:
    """The polynomial through (xs, ys), of degree len(xs) - 1, at x."""
    total = 0.0
    for i, (xi, yi) in enumerate(zip(xs, ys)):
        term = yi
        for j, xj in enumerate(xs):
            if j != i:
                term *= (x - xj) / (xi - xj)
        total += term
    return total


def sweep_states(points: list[PlannedPoint], step_top_points: int) -> dict[SweepKey, SweepState]:
    """A fresh state for every sweep of the plan; the step check goes to each sweep's
    `step_top_points` highest tone powers."""
    levels: dict[SweepKey, set[float]] = {}
    for point in points:
        levels.setdefault(point.sweep_key, set()).add(point.tone_dbm)
    return {key: SweepState(max(values), frozenset(sorted(values)[-step_top_points:]) if step_top_points else frozenset())
            for key, values in levels.items()}
