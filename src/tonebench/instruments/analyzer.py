"""Spectrum analyzer role driver: settings, a single sweep, marker reads at given frequencies."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from tonebench.instruments.scpi import LimitError, RoleDriver, ScpiInstrument


@dataclass(frozen=True)
class AnalyzerSetup:
    """Analyzer settings that do not change with the tone frequencies."""

    span_hz: float
    rbw_hz: float
    vbw_hz: float
    atten_db: float
    ref_level_dbm: float


@dataclass(frozen=True)
class MarkerReading:
    """Marker powers (dBm, in the order asked), the overload flag, and the sweep time (s)."""

    powers_dbm: tuple[float, ...]
    overload: bool
    sweep_time_s: float


class SpectrumAnalyzer(RoleDriver):
    """A swept spectrum analyzer reached through an analyzer dialect."""

    def __init__(self, instrument: ScpiInstrument):
        super().__init__(instrument)
        self.limits = instrument.dialect.limits
        self.performance = instrument.dialect.performance
        self._overload_bit = instrument.dialect.status["overload_bit"]
        # operation -> value last sent, so apply() and read_markers() skip unchanged settings
        self._sent: dict[str, float] = {}

    def prepare(self) -> None:
        """Clear status and switch to single sweeps; the instrument state is then unknown."""
        self.forget_state()
        self.instrument.configure([("clear_status", {}), ("single_sweep_mode", {})])

    def forget_state(self) -> None:
        """Send every setting again next time (e.g. after the analyzer may have lost them)."""
        self._sent.clear()

    def apply(self, setup: AnalyzerSetup) -> None:
        """Send the settings that changed since the last apply, then drain the error queue."""
        low, high = self.limits["min_atten_db"], self.limits["max_atten_db"]
        if not low <= setup.atten_db <= high:
            raise LimitError(
                f"{self.label}: attenuation {setup.atten_db:g} dB outside the "
                f"{self.instrument.dialect.name} range {low:g}..{high:g} dB"
            )
        self._send_changed(
            [
                ("set_span", "span_hz", setup.span_hz),
                ("set_rbw", "rbw_hz", setup.rbw_hz),
                ("set_vbw", "vbw_hz", setup.vbw_hz),
                ("set_attenuation", "atten_db", setup.atten_db),
                ("set_ref_level", "ref_dbm", setup.ref_level_dbm),
            ]
        )

    def read_markers(self, center_hz: float, marker_freqs_hz: Sequence[float]) -> MarkerReading:
        """One single sweep at `center_hz`, then the marker power (dBm) at each frequency (Hz)."""
        low, high = self.limits["min_freq_hz"], self.limits["max_freq_hz"]
        for freq_hz in (center_hz, *marker_freqs_hz):
            if not low <= freq_hz <= high:
                raise LimitError(
                    f"{self.label}: frequency {freq_hz:.6g} Hz outside the "
                    f"{self.instrument.dialect.name} range {low:.6g}..{high:.6g} Hz"
                )
        inst = self.instrument
        self._send_changed([("set_center", "freq_hz", center_hz)], drain=False)
        sweep_time_s = inst.call("read_sweep_time")
        inst.call("start_sweep")
        inst.wait_complete(2 * sweep_time_s + inst.dialect.io.query_timeout_s)
        status = inst.call("read_status")
        overload = bool((status >> self._overload_bit) & 1)
        powers_dbm = []
        for freq_hz in marker_freqs_hz:
            inst.call("set_marker_freq", freq_hz=freq_hz)
            powers_dbm.append(inst.call("read_marker_power"))
        inst.check_errors()
        return MarkerReading(tuple(powers_dbm), overload, sweep_time_s)

    def predicted_sweep_time_s(self, setup: AnalyzerSetup) -> float:
        """Swept-analyzer sweep time k * span / RBW^2 (design section 5), k from the dialect."""
        return self.performance["sweep_time_factor"] * setup.span_hz / setup.rbw_hz**2

    def _send_changed(self, steps: list[tuple[str, str, float]], drain: bool = True) -> None:
        try:
            for operation, field, value in steps:
                if self._sent.get(operation) != value:
                    # Forget first: if the write fails the instrument's value is unknown.
                    self._sent.pop(operation, None)
                    self.instrument.call(operation, **{field: value})
                    self._sent[operation] = value
            if drain:
                self.instrument.check_errors()
        except Exception:
            # A rejected setting leaves the instrument in an unknown state; send all next time.
            self.forget_state()
            raise
