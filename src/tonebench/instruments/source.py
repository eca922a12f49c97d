"""Signal source role driver: one CW tone, RF on and off."""

from __future__ import annotations

from tonebench.errors import InstrumentError
from tonebench.instruments.scpi import LimitError, RoleDriver, ScpiInstrument


class SignalSource(RoleDriver):
    """A signal generator reached through a source dialect. Frequencies in Hz, powers in dBm."""

    def __init__(self, instrument: ScpiInstrument):
        super().__init__(instrument)
        limits = instrument.dialect.limits
        self.min_power_dbm = limits["min_power_dbm"]
        self.max_power_dbm = limits["max_power_dbm"]
        self.min_freq_hz = limits["min_freq_hz"]
        self.max_freq_hz = limits["max_freq_hz"]

    def _wait(self) -> None:
        self.instrument.wait_complete(self.instrument.dialect.io.query_timeout_s)

    def set_tone(self, freq_hz: float, power_dbm: float) -> None:
        """Set frequency and power; returns once the source reports them in force (*OPC?)."""
        name = self.instrument.dialect.name
        if not self.min_freq_hz <= freq_hz <= self.max_freq_hz:
            raise LimitError(
                f"{self.label}: frequency {freq_hz:.6g} Hz outside the {name} range "
                f"{self.min_freq_hz:.6g}..{self.max_freq_hz:.6g} Hz (min_freq_hz/max_freq_hz)"
            )
        if not self.min_power_dbm <= power_dbm <= self.max_power_dbm:
            raise LimitError(
                f"{self.label}: power {power_dbm:.2f} dBm outside the {name} range "
                f"{self.min_power_dbm:.2f}..{self.max_power_dbm:.2f} dBm "
                f"(min_power_dbm/max_power_dbm)"
            )
        self.instrument.configure(
            [("set_frequency", {"freq_hz": freq_hz}), ("set_power", {"power_dbm": power_dbm})]
        )
        # Nothing orders commands across instruments: only this source's own *OPC? tells the
        # analyzer that the new power is in force (design section 5).
        self._wait()

    def rf_on(self) -> None:
        self.instrument.call("rf_on")
        self._wait()
        self.instrument.check_errors()

    def rf_off(self) -> None:
        """Switch RF off and read the state back; InstrumentError if the source says it is on."""
        self.instrument.call("rf_off")
        self._wait()
        if self.rf_is_on():
            raise InstrumentError(f"{self.label}: RF still on after rf_off")
        self.instrument.check_errors()

    def rf_is_on(self) -> bool:
        return self.instrument.call("read_rf")
