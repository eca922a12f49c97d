"""What the simulated instruments hold: each source's setting (commanded and in force, with any
injected settling or drift), the analyzer's settings and last trace, the power meter's."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from tonebench.sim import detector as sim_detector


@dataclass(frozen=True)
class SourceSetting:
    """One source's output: frequency (Hz), power (dBm at its connector), RF on or off."""

    freq_hz: float = 1e9
    power_dbm: float = -30.0
    rf_on: bool = False


@dataclass
class SourceChannel:
    """What a source was told (`commanded`) and what is in force at the DUT (`effective`)."""

    commanded: SourceSetting
    effective: SourceSetting
    # (deadline_s, setting): each change comes into force at its deadline.
    pending: list[tuple[float, SourceSetting]] = field(default_factory=list)
    # A level still settling (fault injection): (from clock_s, error_db then, time constant s).
    unsettled: tuple[float, float, float] | None = None
    # A level drifting with time (fault injection): (from clock_s, dB per second).
    drift: tuple[float, float] | None = None

    def level_error_db(self, clock_s: float) -> float:
        """How far the output level is from its setting at clock_s (dB): an unsettled level decaying
        exponentially plus a drift growing linearly."""
        error_db = 0.0
        if self.drift is not None:
            error_db += self.drift[1] * max(0.0, clock_s - self.drift[0])
        if self.unsettled is None:
            return error_db
        start_s, unsettled_db, time_constant_s = self.unsettled
        return error_db + unsettled_db * math.exp(-max(0.0, clock_s - start_s) / time_constant_s)


@dataclass
class AnalyzerState:
    """Analyzer settings (power-on defaults) and the last trace."""

    center_hz: float = 3.75e9
    span_hz: float = 7.5e9
    rbw_hz: float = 1e6
    vbw_hz: float = 1e6
    atten_db: float = 10.0
    ref_level_dbm: float = 0.0
    continuous: bool = True
    marker_freq_hz: float = 3.75e9
    trace_freq_hz: np.ndarray | None = None
    trace_dbm: np.ndarray | None = None
    overloaded: bool = False  # during the last sweep
    damaged: bool = False  # survives *RST: it is the hardware
    detector: sim_detector.DetectorState = field(default_factory=sim_detector.DetectorState)


@dataclass
class PowerMeterState:
    """Power meter settings (power-on defaults) and its last reading (None until it measured)."""

    freq_hz: float = 1e9
    continuous: bool = True
    unit_dbm: bool = True
    reading_dbm: float | None = None
