"""Power meter role driver: one broadband sensor, single measurements, readings in dBm."""

from __future__ import annotations

from tonebench.errors import InstrumentError
from tonebench.instruments.scpi import LimitError, RoleDriver, ScpiInstrument
from tonebench.units import format_freq


class PowerMeter(RoleDriver):
    """An average power meter reached through a power_meter dialect. Frequencies in Hz, powers in dBm.

    A broadband sensor reads the total power of everything present, so a caller that wants one
    tone's power must have only that tone on.
    """

    def __init__(self, instrument: ScpiInstrument):
        super().__init__(instrument)
        limits = instrument.dialect.limits
        self.min_power_dbm = limits["min_power_dbm"]
        self.max_power_dbm = limits["max_power_dbm"]
        self.min_freq_hz = limits["min_freq_hz"]
        self.max_freq_hz = limits["max_freq_hz"]
        self._freq_hz: float | None = None

    def prepare(self) -> None:
        """Clear status, single measurements, readings in dBm."""
        self._freq_hz = None
        self.instrument.configure([("clear_status", {}), ("configure", {}), ("set_unit_dbm", {})])

    def read_power_dbm(self, freq_hz: float) -> float:
        """One measurement with the sensor corrected for freq_hz (Hz); the reading in dBm.

        Raises InstrumentError for a reading outside the sensor's stated range (below it the
        reading is mostly sensor noise; above it the sensor is out of its square-law region).
        """
        name = self.instrument.dialect.name
        if not self.min_freq_hz <= freq_hz <= self.max_freq_hz:
            raise LimitError(
                f"{self.label}: frequency {format_freq(freq_hz)} outside the {name} range "
                f"{format_freq(self.min_freq_hz)} to {format_freq(self.max_freq_hz)} (min_freq_hz/max_freq_hz)"
            )
        inst = self.instrument
        if self._freq_hz != freq_hz:
            self._freq_hz = None  # unknown if the write fails
            inst.call("set_frequency", freq_hz=freq_hz)
            self._freq_hz = freq_hz
        inst.call("start_measurement")
        inst.wait_complete(inst.dialect.io.query_timeout_s)
        reading_dbm = inst.call("fetch_power")
        inst.check_errors()
        if not self.min_power_dbm <= reading_dbm <= self.max_power_dbm:
            raise InstrumentError(
                f"{self.label}: read {reading_dbm:.2f} dBm at {format_freq(freq_hz)}, outside the {name} range "
                f"{self.min_power_dbm:.2f}..{self.max_power_dbm:.2f} dBm (is the sensor connected?)"
            )
        return reading_dbm
