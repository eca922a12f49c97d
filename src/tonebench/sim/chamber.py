"""A simulated thermal chamber on the bench's virtual clock, and its SCPI front panel.

Thermal model (two first-order lags, common practice for a chamber with a small DUT fixture):
the air follows the set point with air_time_constant_s, within what the chamber can reach
(a set point beyond min_reach_c..max_reach_c settles at the reach limit, so a soak there never
settles: a fault to test); the device follows the air with device_time_constant_s. With the
conditioning off the air relaxes towards ambient_c. The chamber's own sensor reads the air.

Closed form between changes, for a step of the air's target T from t = 0:
    air(t) = T + (a0 - T) e^(-t/ta)
    dev(t) = T + (d0 - T) e^(-t/td) + (a0 - T) ta / (ta - td) (e^(-t/ta) - e^(-t/td))
(the response of the second lag to the first; ta = td is moved apart by a part in a million).

Front panel (drivers/generic-chamber.toml): TEMPerature:SETPoint <degC> and ?, MEASure:TEMPerature?
(the air), OUTPut[:STATe] ON|OFF (conditioning).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from tonebench.sim.scpi_parser import DATA_OUT_OF_RANGE, ScpiDevice, ScpiError, parse_bool, parse_number
from tonebench.units import KELVIN_AT_0C

PANEL_MIN_C = -100.0
PANEL_MAX_C = 250.0


@dataclass
class ThermalState:
    """Where the air and the device were at clock time since_s, and where the air is heading."""

    since_s: float
    air_c: float
    device_c: float
    target_c: float


class SimChamber:
    """The chamber's physics; `clock` gives the bench's virtual time (s)."""

    def __init__(self, scenario, clock: Callable[[], float]):
        self.scenario = scenario
        self.clock = clock
        self.set_point_c = scenario.start_c
        self.conditioning = True
        start = scenario.start_c
        self.state = ThermalState(clock(), start, start, start)

    def _target_c(self) -> float:
        s = self.scenario
        if not self.conditioning:
            return s.ambient_c
        return min(max(self.set_point_c, s.min_reach_c), s.max_reach_c)

    def temperatures_c(self, at_s: float | None = None) -> tuple[float, float]:
        """(air, device) in degC at clock time at_s (now by default)."""
        state, s = self.state, self.scenario
        t_s = max(0.0, (self.clock() if at_s is None else at_s) - state.since_s)
        ta, td = s.air_time_constant_s, s.device_time_constant_s
        if abs(ta - td) < 1e-6 * ta:
            td = ta * (1.0 + 1e-6)
        target = state.target_c
        air_decay, device_decay = math.exp(-t_s / ta), math.exp(-t_s / td)
        air_c = target + (state.air_c - target) * air_decay
        device_c = (target + (state.device_c - target) * device_decay
                    + (state.air_c - target) * ta / (ta - td) * (air_decay - device_decay))
        return air_c, device_c

    def air_c(self) -> float:
        return self.temperatures_c()[0]

    def device_temp_k(self) -> float:
        return self.temperatures_c()[1] + KELVIN_AT_0C

    def _change(self, **values) -> None:
        # Freeze where the temperatures are now, then change what the air heads for.
        now_s = self.clock()
        air_c, device_c = self.temperatures_c(now_s)
        for name, value in values.items():
            setattr(self, name, value)
        self.state = ThermalState(now_s, air_c, device_c, self._target_c())

    def set_point(self, temp_c: float) -> None:
        self._change(set_point_c=temp_c)

    def set_conditioning(self, on: bool) -> None:
        self._change(conditioning=on)


class SimChamberPanel(ScpiDevice):
    """Front panel of one SimChamber; lines go into the bench's log (bench_log(name, line))."""

    def __init__(self, chamber: SimChamber, bench_log: Callable[[str, str], None], name: str = "chamber",
                 idn: str = "tonebench,simulated thermal chamber,SIM-TC-0001,0.1"):
        super().__init__(idn)
        self.chamber = chamber
        self.bench_log = bench_log
        self.name = name
        self.command("TEMPerature:SETPoint", self._set_point, nparams=1)
        self.query("TEMPerature:SETPoint", lambda p: repr(float(self.chamber.set_point_c)), nparams=0)
        self.query("MEASure:TEMPerature", lambda p: f"{self.chamber.air_c():.3f}", nparams=0)
        self.command("OUTPut[:STATe]", lambda p: self.chamber.set_conditioning(parse_bool(p[0])), nparams=1)
        self.query("OUTPut[:STATe]", lambda p: "1" if self.chamber.conditioning else "0", nparams=0)

    def handle_line(self, line: str) -> str | None:
        # The server calls this under the bench's shared lock.
        self.bench_log(self.name, line)
        return super().handle_line(line)

    def _set_point(self, params: list[str]) -> None:
        temp_c = parse_number(params[0], "CEL")
        if not PANEL_MIN_C <= temp_c <= PANEL_MAX_C:
            raise ScpiError(DATA_OUT_OF_RANGE,
                            f"Data out of range;set point {temp_c:g} outside {PANEL_MIN_C:g} to {PANEL_MAX_C:g}")
        self.chamber.set_point(temp_c)

    def reset(self) -> None:
        self.chamber.set_conditioning(False)
