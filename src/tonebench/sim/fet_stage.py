"""The simulated FET as the bench's device: a common-source stage biased by the simulated gate
and drain supplies, its RF output and the DC currents the supplies see.

Stage model (memoryless, every voltage a peak value in the 50-ohm system):
    gate voltage      vg(t) = Vg + k x(t)          k = input_voltage_gain (the input match)
    output voltage    y(t)  = RL (Id(vg(t)) - Id(Vg)) tanh(Vd / knee_v)
Vg and Vd are the supplies' output voltages (0 V while an output is off); RL = load_ohm. The
tanh knee stands in for the triode region: a drain below the knee passes little signal current,
and a drain that is off passes none, so RF with no bias puts out nothing but the analyzer's noise.
The small-signal voltage gain is g1 k RL tanh(Vd/knee) and the third-order term g3 k^3 RL tanh(...),
so the input intercept at the DUT input plane is the gate-plane intercept less 20 log10 k.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tonebench.sim.fet import FetParameters, SimFet
from tonebench.sim.scenario import FetScenario
from tonebench.sim.supply import SimSupply


def fet_of(scenario: FetScenario) -> SimFet:
    """The SimFet whose model parameters the `[simulation.fet]` table gives."""
    names = FetParameters.__dataclass_fields__
    return SimFet(FetParameters(**{name: getattr(scenario, name) for name in names}))


@dataclass(frozen=True)
class FetStage:
    """The stage at one bias; `output_v` is what the time-domain DUT simulation evaluates."""

    fet: SimFet
    gate_v: float
    drain_v: float
    temp_k: float
    input_voltage_gain: float
    load_ohm: float
    knee_v: float

    @property
    def drain_factor(self) -> float:
        return math.tanh(max(0.0, self.drain_v) / self.knee_v)

    def output_v(self, x_v):
        gate_v = self.gate_v + self.input_voltage_gain * np.asarray(x_v, dtype=float)
        signal_a = self.fet.drain_a(gate_v, self.temp_k) - self.fet.drain_a(self.gate_v, self.temp_k)
        return self.load_ohm * self.drain_factor * signal_a

    def gain_db(self) -> float:
        """Small-signal power gain from the DUT input plane to the output (dB; -inf with no gain)."""
        g1_s = float(self.fet.series(self.gate_v, self.temp_k).g1_s)
        voltage_gain = g1_s * self.input_voltage_gain * self.load_ohm * self.drain_factor
        return 20.0 * math.log10(voltage_gain) if voltage_gain > 0.0 else -math.inf

    def iip3_dbm(self) -> float:
        """Small-signal IIP3 at the DUT input plane (dBm; +inf at the g3 zero)."""
        gate_plane_dbm = float(self.fet.iip3_dbm(self.gate_v, self.temp_k))
        return gate_plane_dbm - 20.0 * math.log10(self.input_voltage_gain)


class FetBias:
    """The FET between its gate and drain supplies (channel 1 of each): it sets their loads, so
    the drain current they read follows the gate voltage, and builds the stage at the bias in force."""

    def __init__(self, scenario: FetScenario, gate: SimSupply, drain: SimSupply):
        self.scenario = scenario
        self.fet = fet_of(scenario)
        self.gate = gate
        self.drain = drain
        self.temp_of = lambda: scenario.temp_k  # a chamber replaces it with its device temperature
        gate.set_load(1, lambda voltage_v: voltage_v / scenario.gate_leakage_ohm)
        drain.set_load(1, self.drain_current_a)

    @property
    def temp_k(self) -> float:
        return self.temp_of()

    def gate_v(self) -> float:
        return self.gate.channel(1).operating_point()[0]

    def drain_current_a(self, drain_v: float) -> float:
        """The drain supply's load: Id at the gate voltage in force, through the knee."""
        factor = math.tanh(max(0.0, drain_v) / self.scenario.knee_v)
        return float(self.fet.drain_a(self.gate_v(), self.temp_k)) * factor

    def stage(self) -> FetStage:
        fet = self.scenario
        return FetStage(self.fet, self.gate_v(), self.drain.channel(1).operating_point()[0], self.temp_k,
                        fet.input_voltage_gain, fet.load_ohm, fet.knee_v)
