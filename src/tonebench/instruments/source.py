"""Signal source role driver: one CW tone, RF on and off."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

import pyvisa

from tonebench.errors import InstrumentError
from tonebench.instruments.scpi import (
    POWER_ON_BIT,
    LimitError,
    RoleDriver,
    ScpiInstrument,
    parse_reply,
)
from tonebench.units import format_freq

# (source label, freq_hz, power_dbm) -> None, or raises LimitError: the bench's own limits,
# checked before every power command this driver sends.
PowerGuard = Callable[[str, float, float], None]


@dataclass(frozen=True)
class SourceState:
    """A source's frequency (Hz), power (dBm) and RF state; None where not known or not readable."""

    freq_hz: float | None = None
    power_dbm: float | None = None
    rf_on: bool | None = None


class SignalSource(RoleDriver):
    """A signal generator reached through a source dialect. Frequencies in Hz, powers in dBm."""

    def __init__(self, instrument: ScpiInstrument, power_guard: PowerGuard | None = None):
        super().__init__(instrument)
        limits = instrument.dialect.limits
        self.min_power_dbm = limits["min_power_dbm"]
        self.max_power_dbm = limits["max_power_dbm"]
        self.min_freq_hz = limits["min_freq_hz"]
        self.max_freq_hz = limits["max_freq_hz"]
        # What this driver last asked for, recorded before it is sent: a reopened connection or
        # an instrument that lost its state gets exactly this again (restore).
        self.wanted = SourceState(rf_on=False)
        # A run's limits on the power into the DUT and the analyzer, in force from the first command.
        self.power_guard = power_guard
        # Frequency and power known to be in force (sent and *OPC? answered): only changes are
        # sent. Unknown (None) after a failed command; restore() sends everything again.
        self._in_force = SourceState()
        self._unfinished: list[tuple[str, dict]] | None = None  # sent by start_tone, not yet waited for
        instrument.add_restore_hook(self.restore)

    def _wait_s(self) -> float:
        return self.instrument.dialect.io.query_timeout_s

    def set_tone(self, freq_hz: float, power_dbm: float) -> None:
        """Set frequency and power; returns once the source reports them in force (*OPC?)."""
        steps = self._changed_tone(freq_hz, power_dbm)
        if steps:
            self._configure_tone(steps)

    def start_tone(self, freq_hz: float, power_dbm: float) -> bool:
        """Check frequency and power against the limits and send what changed, without waiting
        for *OPC?, then read the RF state on the same line: its reply says the source has taken
        the settings, so another source set next settles at the same time (a write alone could
        still be unread when that one's *OPC? is answered). Returns whether anything was sent;
        if so, finish_tone() must follow before the tone is used."""
        steps = self._changed_tone(freq_hz, power_dbm)
        self._unfinished = steps or None
        if not steps:
            return False
        self._in_force = SourceState()  # not known until its *OPC? answers
        self.instrument.call_many([*steps, ("read_rf", {})])
        return True

    def _changed_tone(self, freq_hz: float, power_dbm: float) -> list[tuple[str, dict]]:
        """Frequency and power checked against the source's range and the run's power guard,
        recorded as wanted; the steps that change what is in force."""
        name = self.instrument.dialect.name
        if not self.min_freq_hz <= freq_hz <= self.max_freq_hz:
            raise LimitError(
                f"{self.label}: frequency {format_freq(freq_hz)} outside the {name} range "
                f"{format_freq(self.min_freq_hz)} to {format_freq(self.max_freq_hz)} (min_freq_hz/max_freq_hz)"
            )
        if not self.min_power_dbm <= power_dbm <= self.max_power_dbm:
            raise LimitError(
                f"{self.label}: power {power_dbm:.2f} dBm outside the {name} range "
                f"{self.min_power_dbm:.2f}..{self.max_power_dbm:.2f} dBm "
                f"(min_power_dbm/max_power_dbm)"
            )
        if self.power_guard is not None:
            self.power_guard(self.label, freq_hz, power_dbm)
        self.wanted = replace(self.wanted, freq_hz=freq_hz, power_dbm=power_dbm)
        return [(operation, {field: value}) for operation, field, value, before in (
                ("set_frequency", "freq_hz", freq_hz, self._in_force.freq_hz),
                ("set_power", "power_dbm", power_dbm, self._in_force.power_dbm)) if value != before]

    def finish_tone(self) -> None:
        """Wait for the source's *OPC? after start_tone (and read its error queue, on the same
        line where the dialect joins). Nothing orders commands across instruments: only this
        source's own *OPC? tells the analyzer that the new power is in force (design section 5)."""
        steps, self._unfinished = self._unfinished, None
        if steps is not None:
            self._configure_tone(steps, sent=True)

    def _configure_tone(self, steps: list[tuple[str, dict]], sent: bool = False) -> None:
        try:
            self.instrument.configure(steps, wait_s=self._wait_s(), sent=sent)
        except BaseException:
            self._in_force = SourceState()
            raise
        self._in_force = SourceState(freq_hz=self.wanted.freq_hz, power_dbm=self.wanted.power_dbm)

    def rf_on(self) -> None:
        supervision = self.instrument.supervision
        if supervision is not None and supervision.stop.is_set():
            raise InstrumentError(f"{self.label}: RF on refused: the run is stopping")
        self.wanted = replace(self.wanted, rf_on=True)
        self.instrument.configure([("rf_on", {})], wait_s=self._wait_s())

    def rf_off(self) -> None:
        """Switch RF off and read the state back; InstrumentError if the source says it is on."""
        self.wanted = replace(self.wanted, rf_on=False)
        self.instrument.configure([("rf_off", {})], wait_s=self._wait_s())
        if self.rf_is_on():
            raise InstrumentError(f"{self.label}: RF still on after rf_off")

    def rf_is_on(self) -> bool:
        return self.instrument.call("read_rf")

    def read_state(self) -> SourceState:
        """Frequency, power and RF state as the source reports them (None where the dialect
        has no read-back operation)."""
        inst = self.instrument
        return SourceState(
            freq_hz=inst.call("read_frequency") if inst.has("read_frequency") else None,
            power_dbm=inst.call("read_power") if inst.has("read_power") else None,
            rf_on=self.rf_is_on(),
        )

    def clear_status(self) -> None:
        """Clear the status registers (*CLS): the power-on bit from its last switch-on goes."""
        self.instrument.configure([("clear_status", {})])

    def state_lost(self, power_tolerance_db: float = 0.1) -> str | None:
        """Compare the read-back state with what was last set; describe any difference, else None.
        With a read_event_status operation, its power-on bit and the RF state decide.

        A source that was reset or power-cycled reports its defaults (RF off, another power and
        frequency). The tolerances only absorb an instrument's own resolution: 0.1 dB, and 1 Hz
        or 0.1 ppm of the frequency.
        """
        if self.instrument.has("read_event_status"):
            # The power-on bit misses a front-panel preset, which turns RF off (on the sources we
            # know, from memory): the RF state is read with it (one line with [io] one_line).
            status, rf_on = self.instrument.call_many([("read_event_status", {}), ("read_rf", {})])
            if int(status) & POWER_ON_BIT:
                return f"{self.label}: power-on bit set (switched off and on, or rebooted)"
            if self.wanted.rf_on is not None and rf_on != self.wanted.rf_on:
                return f"{self.label}: RF {'on' if rf_on else 'off'}, expected {'on' if self.wanted.rf_on else 'off'} (preset?)"
            return None
        wanted, actual = self.wanted, self.read_state()
        differences = []
        if wanted.rf_on is not None and actual.rf_on != wanted.rf_on:
            differences.append(f"RF {'on' if actual.rf_on else 'off'}, expected {'on' if wanted.rf_on else 'off'}")
        if None not in (wanted.power_dbm, actual.power_dbm) and abs(actual.power_dbm - wanted.power_dbm) > power_tolerance_db:
            differences.append(f"power {actual.power_dbm:.2f} dBm, expected {wanted.power_dbm:.2f} dBm")
        if None not in (wanted.freq_hz, actual.freq_hz) and abs(actual.freq_hz - wanted.freq_hz) > max(1.0, 1e-7 * wanted.freq_hz):
            differences.append(f"frequency {format_freq(actual.freq_hz)}, expected {format_freq(wanted.freq_hz)}")
        return f"{self.label}: " + ", ".join(differences) if differences else None

    def restore(self) -> None:
        """Send what was last asked for again: frequency, power, then the RF state.

        RF comes back on only if it was on and no stop was requested.
        """
        wanted = self.wanted
        steps: list[tuple[str, dict]] = []
        if wanted.freq_hz is not None:
            steps.append(("set_frequency", {"freq_hz": wanted.freq_hz}))
        if wanted.power_dbm is not None:
            steps.append(("set_power", {"power_dbm": wanted.power_dbm}))
        supervision = self.instrument.supervision
        stopping = supervision is not None and supervision.stop.is_set()
        steps.append(("rf_on", {}) if wanted.rf_on and not stopping else ("rf_off", {}))
        self._configure_tone(steps)

    def force_rf_off(self, lock_wait_s: float = 0.5) -> str:
        """RF off from another thread (the watchdog), even while the run's thread is stuck in a
        call on this source; confirmed by reading the state back. Returns how it was done.

        Through the usual connection when it is free within `lock_wait_s` seconds, else through a
        second connection of its own (most LAN instruments accept several).
        """
        self.wanted = replace(self.wanted, rf_on=False)
        inst = self.instrument
        if inst.io_lock.acquire(timeout=lock_wait_s):
            try:
                self.rf_off()
                return "through its connection"
            except InstrumentError:
                pass  # that connection is broken: try a fresh one
            finally:
                inst.io_lock.release()
        from tonebench.instruments.transport import connect

        if inst.resource_name is None:
            raise InstrumentError(f"{self.label}: RF off failed: no second connection possible")
        ops = inst.dialect.operations
        handle, _idn = connect(inst.resource_name, inst.dialect, inst.label, inst.visa_library)
        try:
            handle.write(ops["rf_off"].template)
            handle.query(ops["wait_complete"].template)
            still_on = parse_reply("bool", handle.query(ops["read_rf"].template))
        except (pyvisa.errors.Error, OSError, ValueError) as exc:
            raise InstrumentError(f"{self.label}: RF off through a second connection failed: {exc}") from None
        finally:
            handle.close()
        if still_on:
            raise InstrumentError(f"{self.label}: RF still on after rf_off through a second connection")
        return "through a second connection"
