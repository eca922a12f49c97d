"""SCPI front panels of the simulated source and analyzer, over one shared SimBench.

The command trees accept what drivers/generic-source.toml, generic-analyzer.toml,
verbose-analyzer.toml and generic-power-meter.toml send (short and long forms, optional nodes,
unit suffixes), and the query of every setting.
"""

from __future__ import annotations

from typing import Callable

from tonebench.sim.detector_panel import add_detector_commands
from tonebench.sim.instrument_state import PowerMeterState
from tonebench.sim.mixer import LO_ROLE, LO_SOURCE_INDEX
from tonebench.sim.scpi_parser import (
    DATA_OUT_OF_RANGE,
    EXECUTION_ERROR,
    ScpiDevice,
    ScpiError,
    parse_bool,
    parse_number,
)
from tonebench.sim.signal_chain import SimBench
from tonebench.units import dbm_to_watt

SOURCE_MIN_FREQ_HZ = 9e3
SOURCE_MAX_FREQ_HZ = 6e9
ANALYZER_MIN_FREQ_HZ = 9e3
ANALYZER_MAX_FREQ_HZ = 7.5e9
ANALYZER_MIN_BW_HZ = 1.0
ANALYZER_MAX_BW_HZ = 10e6
ANALYZER_MAX_ATTEN_DB = 70.0
ANALYZER_ATTEN_STEP_DB = 2.0
ANALYZER_MIN_REF_DBM = -150.0
ANALYZER_MAX_REF_DBM = 30.0
OVERLOAD_BIT = 3  # of STATus:QUEStionable:CONDition
POWER_METER_MIN_FREQ_HZ = 10e6
POWER_METER_MAX_FREQ_HZ = 18e9


def _in_range(value: float, low: float, high: float, what: str) -> float:
    if not low <= value <= high:
        raise ScpiError(DATA_OUT_OF_RANGE, f"Data out of range;{what} {value:g} outside {low:g} to {high:g}")
    return value


def _number(params: list[str], unit: str, low: float, high: float, what: str) -> float:
    return _in_range(parse_number(params[0], unit), low, high, what)


def _fmt(value: float) -> str:
    return repr(float(value))


class _BenchDevice(ScpiDevice):
    """An instrument of the bench: logs every received line with the virtual time."""

    def __init__(self, bench: SimBench, name: str, idn: str):
        super().__init__(idn)
        self.bench = bench
        self.name = name

    def handle_line(self, line: str) -> str | None:
        with self.bench.lock:
            self.bench.log(self.name, line)
            return super().handle_line(line)

    def _setting(self, patterns: tuple[str, ...], setter: Callable[[list[str]], None],
                 getter: Callable[[], str]) -> None:
        for pattern in patterns:
            self.command(pattern, setter, nparams=1)
            self.query(pattern, lambda params: getter(), nparams=0)


class SimSource(_BenchDevice):
    """Signal source number `index` (1 or 2) of the bench."""

    def __init__(self, bench: SimBench, index: int):
        if index not in (1, 2, LO_SOURCE_INDEX):
            raise ValueError(f"SimSource index {index}: must be 1, 2 or {LO_SOURCE_INDEX} (the LO of a mixer bench)")
        name = LO_ROLE if index == LO_SOURCE_INDEX else f"source{index}"
        super().__init__(bench, name, f"tonebench,simulated two-tone source,SIM-SRC-000{index},0.1")
        self.index = index
        limits = bench.scenario.sources
        self._setting(
            ("[SOURce]:FREQuency[:CW]", "[SOURce]:FREQuency:FIXed"),
            lambda p: bench.set_source(
                index, freq_hz=_number(p, "HZ", SOURCE_MIN_FREQ_HZ, SOURCE_MAX_FREQ_HZ, "frequency")),
            lambda: _fmt(self._commanded().freq_hz),
        )
        self._setting(
            ("[SOURce]:POWer[:LEVel][:IMMediate][:AMPLitude]",),
            lambda p: bench.set_source(
                index, power_dbm=_number(p, "DBM", limits.min_power_dbm, limits.max_power_dbm, "power")),
            lambda: _fmt(self._commanded().power_dbm),
        )
        self._setting(
            ("OUTPut[:STATe]",),
            lambda p: bench.set_source(index, rf_on=parse_bool(p[0])),
            lambda: "1" if self._commanded().rf_on else "0",
        )

    def _commanded(self):
        return self.bench.source(self.index).commanded

    def reset(self) -> None:
        self.bench.reset_source(self.index)

    def unsettle(self, level_error_db: float, time_constant_s: float) -> None:
        """Fault hook (sim/faults.py, kind "unsettled"): the level settles slowly after this change."""
        self.bench.unsettle_source(self.index, level_error_db, time_constant_s)

    def drift(self, drift_db_per_s: float) -> None:
        """Fault hook (sim/faults.py, kind "drift"): the level moves slowly from now on."""
        self.bench.drift_source(self.index, drift_db_per_s)

    def operation_complete(self) -> None:
        self.bench.settle_source(self.index)


class SimAnalyzer(_BenchDevice):
    """Swept spectrum analyzer of the bench."""

    def __init__(self, bench: SimBench):
        super().__init__(bench, "analyzer", "tonebench,simulated spectrum analyzer,SIM-SA-0001,0.1")
        freq = (ANALYZER_MIN_FREQ_HZ, ANALYZER_MAX_FREQ_HZ)
        bw = (ANALYZER_MIN_BW_HZ, ANALYZER_MAX_BW_HZ)
        self._number_field("[SENSe]:FREQuency:CENTer", "center_hz", "HZ", *freq, "center")
        self._number_field("[SENSe]:FREQuency:SPAN", "span_hz", "HZ", 0.0, ANALYZER_MAX_FREQ_HZ, "span")
        self._number_field("[SENSe]:BANDwidth[:RESolution]", "rbw_hz", "HZ", *bw, "RBW")
        self._number_field("[SENSe]:BANDwidth:VIDeo", "vbw_hz", "HZ", *bw, "VBW")
        self._number_field("DISPlay:WINDow#:TRACe:Y[:SCALe]:RLEVel", "ref_level_dbm", "DBM",
                           ANALYZER_MIN_REF_DBM, ANALYZER_MAX_REF_DBM, "reference level")
        self._number_field("CALCulate#:MARKer#:X", "marker_freq_hz", "HZ", *freq, "marker")
        self._setting(("INPut:ATTenuation",), self._set_atten, lambda: _fmt(bench.analyzer.atten_db))
        self._setting(("INITiate:CONTinuous",),
                      lambda p: setattr(bench.analyzer, "continuous", parse_bool(p[0])),
                      lambda: "1" if bench.analyzer.continuous else "0")
        self.command("INITiate[:IMMediate]", lambda p: bench.sweep(), nparams=0)
        self.query("[SENSe]:SWEep:TIME", lambda p: _fmt(bench.sweep_time_s()), nparams=0)
        self.query("CALCulate#:MARKer#:Y", lambda p: self._marker_power(), nparams=0)
        self.query("STATus:QUEStionable:CONDition",
                   lambda p: str((1 << OVERLOAD_BIT) if bench.overloaded() else 0), nparams=0)
        add_detector_commands(self)

    def _number_field(self, pattern: str, attr: str, unit: str, low: float, high: float, what: str) -> None:
        # Looked up on each call: *RST replaces the analyzer state object.
        self._setting((pattern,),
                      lambda p: setattr(self.bench.analyzer, attr, _number(p, unit, low, high, what)),
                      lambda: _fmt(getattr(self.bench.analyzer, attr)))

    def _set_atten(self, params: list[str]) -> None:
        atten_db = _number(params, "DB", 0.0, ANALYZER_MAX_ATTEN_DB, "attenuation")
        # Like a step attenuator: the nearest step is set (and read back).
        self.bench.analyzer.atten_db = ANALYZER_ATTEN_STEP_DB * round(atten_db / ANALYZER_ATTEN_STEP_DB)

    def _marker_power(self) -> str:
        try:
            return _fmt(self.bench.marker_power_dbm())
        except LookupError:
            raise ScpiError(EXECUTION_ERROR, "Execution error;no trace yet, start a sweep") from None

    def reset(self) -> None:
        self.bench.reset_analyzer()


class SimPowerMeter(_BenchDevice):
    """Power meter whose sensor sits on a coupled port at the DUT input plane."""

    def __init__(self, bench: SimBench):
        super().__init__(bench, "power_meter", "tonebench,simulated power meter,SIM-PM-0001,0.1")
        self._setting(
            ("[SENSe]:FREQuency[:CW]", "[SENSe]:FREQuency:FIXed"),
            lambda p: setattr(self._state(), "freq_hz",
                              _number(p, "HZ", POWER_METER_MIN_FREQ_HZ, POWER_METER_MAX_FREQ_HZ, "frequency")),
            lambda: _fmt(self._state().freq_hz),
        )
        self._setting(("UNIT:POWer",), self._set_unit, lambda: "DBM" if self._state().unit_dbm else "W")
        self._setting(("INITiate:CONTinuous",),
                      lambda p: setattr(self._state(), "continuous", parse_bool(p[0])),
                      lambda: "1" if self._state().continuous else "0")
        self.command("INITiate[:IMMediate]", lambda p: bench.measure_power(), nparams=0)
        # CONFigure sets up one measurement: single-shot; its optional expected value and
        # resolution are accepted and not needed here (one range covers the sensor).
        self.command("CONFigure[:SCALar][:POWer][:AC]", lambda p: setattr(self._state(), "continuous", False))
        self.query("FETCh[:SCALar][:POWer][:AC]", lambda p: self._fetch(), nparams=0)
        self.query("READ[:SCALar][:POWer][:AC]", lambda p: self._read(), nparams=0)

    def _state(self) -> PowerMeterState:
        return self.bench.power_meter  # looked up on each call: *RST replaces it

    def _set_unit(self, params: list[str]) -> None:
        word = params[0].strip().upper()
        if word not in ("DBM", "W"):
            raise ScpiError(DATA_OUT_OF_RANGE, f"Data out of range;unit {word} is not DBM or W")
        self._state().unit_dbm = word == "DBM"

    def _fetch(self) -> str:
        reading_dbm = self._state().reading_dbm
        if reading_dbm is None:
            raise ScpiError(EXECUTION_ERROR, "Execution error;no measurement yet, INITiate first")
        return _fmt(reading_dbm if self._state().unit_dbm else float(dbm_to_watt(reading_dbm)))

    def _read(self) -> str:
        self.bench.measure_power()
        return self._fetch()

    def reset(self) -> None:
        self.bench.reset_power_meter()
