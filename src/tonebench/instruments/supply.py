"""DC supply role driver: one output (channel) of a supply or SMU; volts and amps.

A bias that has tripped must never be read as zero bias: every measurement first asks whether
the output tripped (or, where the dialect has no trip query, whether the output is still on)
and raises SupplyTripped if so.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

from tonebench.errors import InstrumentError
from tonebench.instruments.scpi import LimitError, RoleDriver, ScpiInstrument


class SupplyTripped(InstrumentError):
    """The output switched itself off (over-current protection, or lost) while it should be on."""


@dataclass(frozen=True)
class SupplyState:
    """What was last asked of one output; None where nothing was asked yet."""

    voltage_v: float | None = None
    current_limit_a: float | None = None
    output_on: bool | None = None


class DcSupply(RoleDriver):
    """Output `channel` (from 1) of an instrument reached through a supply dialect."""

    def __init__(self, instrument: ScpiInstrument, channel: int = 1, label: str | None = None):
        super().__init__(instrument)
        # Its own role name: gate and drain may be two outputs of one instrument.
        self._label = label or instrument.label
        if channel < 1:
            raise ValueError(f"{instrument.label}: channel {channel}; outputs are numbered from 1")
        limits = instrument.dialect.limits
        self.channel = channel
        self.min_voltage_v = limits["min_voltage_v"]
        self.max_voltage_v = limits["max_voltage_v"]
        self.min_current_a = limits["min_current_a"]
        self.max_current_a = limits["max_current_a"]
        # Recorded before it is sent: a reopened connection gets exactly this again (restore).
        self.wanted = SupplyState(output_on=False)
        self._protection_armed = False
        instrument.add_restore_hook(self.restore)

    @property
    def label(self) -> str:
        return self._label

    def _wait_s(self) -> float:
        return self.instrument.dialect.io.query_timeout_s

    def _configure(self, *operations: tuple[str, dict]) -> None:
        steps = [(name, {"channel": self.channel, **fields}) for name, fields in operations]
        self.instrument.configure(steps, wait_s=self._wait_s())

    def _call(self, operation: str):
        return self.instrument.call(operation, channel=self.channel)

    def prepare(self) -> None:
        """Clear status and, where the dialect can, arm over-current protection: a load over the
        limit then trips the output (a fault) rather than pulling the voltage down unnoticed."""
        self.instrument.configure([("clear_status", {})])
        if self.instrument.has("enable_protection"):
            self._configure(("enable_protection", {}))
            self._protection_armed = True

    def set_voltage(self, voltage_v: float) -> None:
        """Set the output voltage (V); returns once the instrument reports it in force (*OPC?)."""
        if not self.min_voltage_v <= voltage_v <= self.max_voltage_v:
            raise LimitError(
                f"{self.label}: voltage {voltage_v:.6g} V outside the {self.instrument.dialect.name} range "
                f"{self.min_voltage_v:.6g}..{self.max_voltage_v:.6g} V (min_voltage_v/max_voltage_v)"
            )
        self.wanted = replace(self.wanted, voltage_v=voltage_v)
        self._configure(("set_voltage", {"voltage_v": voltage_v}))

    def set_current_limit(self, current_a: float) -> None:
        """Set the current limit (compliance), a magnitude in A."""
        if not self.min_current_a <= current_a <= self.max_current_a:
            raise LimitError(
                f"{self.label}: current limit {current_a:.6g} A outside the {self.instrument.dialect.name} range "
                f"{self.min_current_a:.6g}..{self.max_current_a:.6g} A (min_current_a/max_current_a)"
            )
        self.wanted = replace(self.wanted, current_limit_a=current_a)
        self._configure(("set_current_limit", {"current_a": current_a}))

    def output_on(self) -> None:
        """Switch the output on; SupplyTripped if it trips at once (or does not come on)."""
        supervision = self.instrument.supervision
        if supervision is not None and supervision.stop.is_set():
            raise InstrumentError(f"{self.label}: output on refused: the run is stopping")
        if self.wanted.voltage_v is None or self.wanted.current_limit_a is None:
            raise InstrumentError(f"{self.label}: output on refused: set the voltage and current limit first")
        if self.tripped():
            raise SupplyTripped(f"{self.label}: channel {self.channel} is still tripped; output on refused")
        self.wanted = replace(self.wanted, output_on=True)
        self._configure(("output_on", {}))
        self.check_output()

    def output_off(self) -> None:
        """Switch the output off and read it back; InstrumentError if it says it is still on."""
        self.wanted = replace(self.wanted, output_on=False)
        self._configure(("output_off", {}))
        if self.output_is_on():
            raise InstrumentError(f"{self.label}: output still on after output_off")

    def output_is_on(self) -> bool:
        return self._call("read_output")

    def tripped(self) -> bool | None:
        """Whether over-current protection has tripped; None where the dialect cannot tell."""
        return self._call("read_tripped") if self.instrument.has("read_tripped") else None

    def check_output(self) -> None:
        """Raise SupplyTripped if an output that should be on has tripped or gone off."""
        if not self.wanted.output_on:
            return
        if self.tripped():
            raise SupplyTripped(f"{self.label}: channel {self.channel} tripped (over-current protection at "
                                f"{self.wanted.current_limit_a:.6g} A); its output is off")
        if not self.output_is_on():
            raise SupplyTripped(f"{self.label}: channel {self.channel} output is off, expected on")

    def measure_current_a(self) -> float:
        """The output current (A); checked after reading, so a reading taken as the output
        tripped is never returned."""
        reading_a = self._call("measure_current")
        self.check_output()
        return reading_a

    def measure_voltage_v(self) -> float:
        """The output voltage (V), checked like measure_current_a."""
        reading_v = self._call("measure_voltage")
        self.check_output()
        return reading_v

    def measure(self) -> tuple[float, float]:
        """Voltage (V) and current (A) together, checked once after both readings."""
        reading_v, reading_a = self._call("measure_voltage"), self._call("measure_current")
        self.check_output()
        return reading_v, reading_a

    def restore(self) -> None:
        """Send what was last asked for again: voltage, current limit, then the output state.

        The output comes back on only if it was on and no stop was requested; a trip is not
        cleared here (it is a fault for the run to report)."""
        wanted = self.wanted
        steps: list[tuple[str, dict]] = [("enable_protection", {})] if self._protection_armed else []
        if wanted.voltage_v is not None:
            steps.append(("set_voltage", {"voltage_v": wanted.voltage_v}))
        if wanted.current_limit_a is not None:
            steps.append(("set_current_limit", {"current_a": wanted.current_limit_a}))
        supervision = self.instrument.supervision
        stopping = supervision is not None and supervision.stop.is_set()
        steps.append(("output_on", {}) if wanted.output_on and not stopping else ("output_off", {}))
        self._configure(*steps)
