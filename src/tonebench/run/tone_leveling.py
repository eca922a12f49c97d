"""Leveling the tones with the power meter, once per sweep and tone frequency.

At the start of each sweep each tone is leveled at the sweep's highest tone power, one source on
at a time, and the correction is kept per source and frequency for the run and applied to every
point at that frequency (sources are taken to be linear in level over a sweep): a later sweep at
the same tone frequency reuses it.
"""

from __future__ import annotations

from tonebench.calibration.leveling import IMBALANCE_LIMIT_DB, Leveler, LevelResult
from tonebench.plan.limits import check_source_power
from tonebench.plan.points import PlannedPoint
from tonebench.planes import arithmetic
from tonebench.planes.loss_table import LossTable
from tonebench.run.rf_switches import RfSwitches
from tonebench.units import format_freq


class ToneLeveling:
    def __init__(self, bench, offsets: dict[str, LossTable], leveler: Leveler, rf: RfSwitches, log):
        self.bench = bench
        self.offsets = offsets
        self.leveler = leveler
        self.rf = rf
        self.log = log
        # (source number 1 or 2, tone freq_hz) -> its leveling, kept for the run across sweeps
        self._levels: dict[tuple[int, float], LevelResult] = {}

    def correction(self, index: int, freq_hz: float) -> LevelResult | None:
        return self._levels.get((index, freq_hz))

    def level_sweep(self, point: PlannedPoint, reference_dbm: float) -> None:
        """Level both tones of this point's sweep at reference_dbm, unless already done for their frequencies."""
        tones = ((1, point.f1_hz, "in1"), (2, point.f2_hz, "in2"))
        if all((index, freq_hz) in self._levels for index, freq_hz, _ in tones):
            return
        for index, freq_hz, path in tones:
            if (index, freq_hz) not in self._levels:
                self._levels[(index, freq_hz)] = self._level_tone(point, index, freq_hz, path, reference_dbm)
        self.rf.set(False, False)
        first, second = (self._levels[(index, freq_hz)] for index, freq_hz, _ in tones)
        imbalance_db = first.error_db - second.error_db
        if abs(imbalance_db) > IMBALANCE_LIMIT_DB:
            self.log.event(
                "warning", "tone-imbalance",
                f"sweep {format_freq(point.center_hz)} / {format_freq(point.spacing_hz)}: tones differ by {imbalance_db:+.2f} dB "
                f"at the DUT input plane (limit {IMBALANCE_LIMIT_DB} dB)",
                {"center_hz": point.center_hz, "spacing_hz": point.spacing_hz, "imbalance_db": imbalance_db},
            )

    def _level_tone(self, point: PlannedPoint, index: int, freq_hz: float, path: str,
                    reference_dbm: float) -> LevelResult:
        source = self.bench.sources()[index - 1]
        source_range = self.bench.source_ranges[index - 1]
        open_loop_dbm = arithmetic.source_setting_dbm(reference_dbm, self.offsets[path].loss_db(freq_hz))
        check_source_power(source_range, open_loop_dbm, point.key)
        source.set_tone(freq_hz, open_loop_dbm)
        self.rf.set(index == 1, index == 2)  # a broadband meter must see one tone only
        result = self.leveler.level(source, source_range, freq_hz, reference_dbm, open_loop_dbm)
        if not result.converged:
            self.log.event(
                "warning", "leveling",
                f"source{index} at {format_freq(freq_hz)}: {result.error_db:+.3f} dB from its target after "
                f"{result.readings} readings (tolerance {self.leveler.tolerance_db:g} dB)",
                {"source": index, "freq_hz": freq_hz, "error_db": result.error_db,
                 "correction_db": result.correction_db},
            )
        return result
