"""Closed-loop tone leveling with the power meter at the DUT input plane.

A broadband sensor reads the total power of everything present, so each tone is leveled with
only its own source on. The loop: set source = open-loop setting + correction, wait for *OPC?,
read the meter, correct by the error, until the tone is within the tolerance or the iterations are
used up. The correction is bounded: a large one means a loose cable or a wrong calibration, and
turning a source up blindly could damage the DUT.
"""

from __future__ import annotations

from dataclasses import dataclass

from tonebench.errors import InstrumentError
from tonebench.instruments.power_meter import PowerMeter
from tonebench.instruments.source import SignalSource
from tonebench.plan.limits import SourceRange, check_source_power
from tonebench.units import format_freq

DEFAULT_TOLERANCE_DB = 0.05
DEFAULT_MAX_ITERATIONS = 5
DEFAULT_MAX_CORRECTION_DB = 3.0
IMBALANCE_LIMIT_DB = 0.5  # design section 4: tone imbalance at the DUT input plane worth flagging


@dataclass(frozen=True)
class LevelResult:
    """correction_db: added to the open-loop setting; error_db: meter reading less target with that
    correction in force (dB); readings: meter reads taken."""

    correction_db: float
    error_db: float
    readings: int
    converged: bool


class Leveler:
    def __init__(
        self,
        meter: PowerMeter,
        tolerance_db: float = DEFAULT_TOLERANCE_DB,
        max_iterations: int = DEFAULT_MAX_ITERATIONS,
        max_correction_db: float = DEFAULT_MAX_CORRECTION_DB,
    ):
        self.meter = meter
        self.tolerance_db = tolerance_db
        self.max_iterations = max_iterations
        self.max_correction_db = max_correction_db
        self._prepared = False

    def level(self, source: SignalSource, source_range: SourceRange, freq_hz: float, target_dbm: float,
              open_loop_dbm: float, correction_db: float = 0.0) -> LevelResult:
        """Bring one tone to target_dbm (dBm at the DUT input plane); its source must be the only one on.

        open_loop_dbm: the setting the calibration predicts (planes.arithmetic.source_setting_dbm of
        the target and the input loss). Returns the correction whose reading was last taken,
        converged or not.
        """
        if not self._prepared:
            self.meter.prepare()
            self._prepared = True
        error_db = float("nan")
        for reading in range(1, self.max_iterations + 1):
            setting_dbm = open_loop_dbm + correction_db
            check_source_power(source_range, setting_dbm, f"leveling at {format_freq(freq_hz)}")
            source.set_tone(freq_hz, setting_dbm)  # returns after the source's *OPC?
            error_db = self.meter.read_power_dbm(freq_hz) - target_dbm
            if abs(error_db) <= self.tolerance_db:
                return LevelResult(correction_db, error_db, reading, True)
            if reading == self.max_iterations:
                break
            correction_db -= error_db
            if abs(correction_db) > self.max_correction_db:
                raise InstrumentError(
                    f"leveling {source.label} at {format_freq(freq_hz)}: needs {correction_db:+.2f} dB on top of the "
                    f"calibration, more than the {self.max_correction_db:g} dB allowed; check the connections "
                    "and the calibration set"
                )
        return LevelResult(correction_db, error_db, self.max_iterations, False)
