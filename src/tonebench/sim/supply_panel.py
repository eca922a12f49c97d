"""SCPI front panel of the simulated DC supply (sim/supply.py), in two command trees.

The standard power-supply tree (drivers/generic-supply.toml): the channel is chosen by
INSTrument:NSELect n (or INSTrument[:SELect] OUTn) and the subsystems act on the selected one:
[SOURce]:VOLTage, [SOURce]:CURRent (the current limit), [SOURce]:CURRent:PROTection:STATe
(over the limit trips instead of constant current), :PROTection:TRIPped?, :PROTection:CLEar,
OUTPut[:STATe], MEASure[:SCALar]:CURRent[:DC]? and :VOLTage[:DC]?.

The source-measure tree (drivers/generic-smu.toml) names the channel by a numeric suffix on the
first node (:SOURce2:VOLTage:LEVel, :SENSe2:CURRent:PROTection, :OUTPut2, :MEASure2:CURRent?) and
calls the current limit the compliance (SENSe:CURRent[:DC]:PROTection[:LEVel]). The shared parser
accepts only suffix 1, so a suffixed first node is rewritten into the selection form before it
is parsed; a side effect a real SMU does not have (the selected channel changes) is harmless here.
"""

from __future__ import annotations

import re
from typing import Callable

from tonebench.sim.scpi_parser import (
    DATA_OUT_OF_RANGE,
    SETTINGS_CONFLICT,
    ScpiDevice,
    ScpiError,
    parse_bool,
    parse_number,
)
from tonebench.sim.supply import SimSupply, SupplyChannel

# A suffixed first node of the SMU tree; group 1 the node, group 2 the channel number.
_SUFFIXED = re.compile(r"^:?(SOURCE|SOUR|SENSE|SENS|OUTPUT|OUTP|MEASURE|MEAS)(\d+)(?=[:?\s]|$)", re.I)
_INSTRUMENT_NAME = re.compile(r"OUT(\d+)", re.I)


def _fmt(value: float) -> str:
    return repr(float(value))


class SimSupplyPanel(ScpiDevice):
    """Front panel of one SimSupply; every received line is logged in supply.command_log."""

    def __init__(self, supply: SimSupply, name: str = "supply",
                 idn: str = "tonebench,simulated DC supply,SIM-PS-0001,0.1",
                 bench_log: Callable[[str, str], None] | None = None):
        super().__init__(idn)
        self.supply = supply
        self.name = name
        self.bench_log = bench_log  # (name, line): the bench's log, so one log orders every instrument
        self.selected = 1
        self._setting(("INSTrument:NSELect",), self._select, lambda: str(self.selected))
        self._setting(("INSTrument[:SELect]",), self._select_name, lambda: f"OUT{self.selected}")
        self._setting(("[SOURce]:VOLTage[:LEVel][:IMMediate][:AMPLitude]",), self._set_voltage,
                      lambda: _fmt(self._channel().set_voltage_v))
        self._setting(("[SOURce]:CURRent[:LEVel][:IMMediate][:AMPLitude]",
                       "SENSe:CURRent[:DC]:PROTection[:LEVel]"), self._set_limit,
                      lambda: _fmt(self._channel().current_limit_a))
        self._setting(("[SOURce]:CURRent:PROTection:STATe",),
                      lambda p: self._change(protection_on=parse_bool(p[0])),
                      lambda: "1" if self._channel().protection_on else "0")
        self.query("[SOURce]:CURRent:PROTection:TRIPped", lambda p: self._tripped(), nparams=0)
        self.command("[SOURce]:CURRent:PROTection:CLEar", lambda p: self._change(tripped=False), nparams=0)
        self._setting(("OUTPut[:STATe]",), self._set_output, lambda: "1" if self._channel().output_on else "0")
        self.query("MEASure[:SCALar]:CURRent[:DC]", lambda p: _fmt(self.supply.read_current_a(self.selected)), nparams=0)
        self.query("MEASure[:SCALar]:VOLTage[:DC]", lambda p: _fmt(self._point()[0]), nparams=0)

    def _setting(self, patterns: tuple[str, ...], setter: Callable[[list[str]], None],
                 getter: Callable[[], str]) -> None:
        for pattern in patterns:
            self.command(pattern, setter, nparams=1)
            self.query(pattern, lambda params: getter(), nparams=0)

    def handle_line(self, line: str) -> str | None:
        # The server calls this under the bench's shared lock.
        self.supply.command_log.append(line)
        if self.bench_log is not None:
            self.bench_log(self.name, line)
        return super().handle_line(_unsuffixed(line))

    # --- channel selection and state ----------------------------------------------------------

    def _select(self, params: list[str]) -> None:
        number = parse_number(params[0])
        if number != int(number) or not 1 <= number <= self.supply.channel_count:
            raise ScpiError(DATA_OUT_OF_RANGE, f"Data out of range;channel {params[0]} outside 1 to {self.supply.channel_count}")
        self.selected = int(number)

    def _select_name(self, params: list[str]) -> None:
        match = _INSTRUMENT_NAME.fullmatch(params[0].strip())
        if match is None:
            raise ScpiError(DATA_OUT_OF_RANGE, f"Data out of range;no output named {params[0]}")
        self._select([match.group(1)])

    def _channel(self) -> SupplyChannel:
        return self.supply.channel(self.selected)

    def _change(self, **values) -> None:
        channel = self._channel()
        for key, value in values.items():
            setattr(channel, key, value)
        self.supply.settle()

    def _set_voltage(self, params: list[str]) -> None:
        voltage_v = parse_number(params[0], "V")
        low, high = self.supply.min_voltage_v, self.supply.max_voltage_v
        if not low <= voltage_v <= high:
            raise ScpiError(DATA_OUT_OF_RANGE, f"Data out of range;voltage {voltage_v:g} outside {low:g} to {high:g}")
        self._change(set_voltage_v=voltage_v)

    def _set_limit(self, params: list[str]) -> None:
        current_a = parse_number(params[0], "A")
        if not 0.0 < current_a <= self.supply.max_current_a:
            raise ScpiError(DATA_OUT_OF_RANGE,
                            f"Data out of range;current {current_a:g} outside 0 to {self.supply.max_current_a:g}")
        self._change(current_limit_a=current_a)

    def _set_output(self, params: list[str]) -> None:
        on = parse_bool(params[0])
        # A tripped output stays off until the trip is cleared, as on a bench supply.
        if on and self._channel().tripped:
            raise ScpiError(SETTINGS_CONFLICT, "Settings conflict;output tripped, clear the protection first")
        self._change(output_on=on)

    def _tripped(self) -> str:
        self.supply.settle()
        return "1" if self._channel().tripped else "0"

    def _point(self) -> tuple[float, float]:
        return self._channel().operating_point()

    def reset(self) -> None:
        self.selected = 1
        self.supply.reset()


def _unsuffixed(line: str) -> str:
    """Rewrite each ';'-separated unit whose first node carries a channel suffix (SMU tree) into
    ':INST:NSEL n;:node...' (from the root: the previous unit's path must not apply). SMU
    templates carry no quoted strings, so a plain split is enough."""
    units = []
    for unit in line.split(";"):
        stripped = unit.strip()
        match = _SUFFIXED.match(stripped)
        if match is None:
            units.append(unit)
            continue
        rest = stripped[match.end():]
        units.append(f":INST:NSEL {match.group(2)};:{match.group(1)}{rest}")
    return ";".join(units)
