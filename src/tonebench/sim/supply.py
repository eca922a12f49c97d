"""State of a simulated DC supply: per channel a set voltage, a current limit, output on/off and a
load that draws a current from the output voltage.

Compliance, as on a bench supply: while the load at the set voltage draws no more than the limit
the channel holds the voltage (constant voltage); above it the channel either holds the limit and
lets the voltage fall (constant current), or, with over-current protection armed, switches its
output off and reports a trip until the trip is cleared. Everything happens at once on a change
(no virtual time is needed: a real supply's trip is much faster than any command exchange).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

# A load: output voltage (V) -> current drawn (A), with the current's sign following the voltage's
# and its magnitude not falling as |V| grows (every passive load is like that; bisection needs it).
Load = Callable[[float], float]

# Steps of the constant-current bisection: 60 halvings put the voltage within 1e-18 of its span.
_BISECTION_STEPS = 60


def resistor(resistance_ohm: float) -> Load:
    """An ohmic load of resistance_ohm (> 0)."""
    if not resistance_ohm > 0.0:
        raise ValueError(f"resistor: {resistance_ohm!r} ohm; needs a resistance > 0")
    return lambda voltage_v: voltage_v / resistance_ohm


def open_circuit(voltage_v: float) -> float:
    return 0.0


@dataclass
class SupplyChannel:
    """One output. `load` may be replaced at any time (a test, a simulated device)."""

    set_voltage_v: float = 0.0
    current_limit_a: float = 0.1
    output_on: bool = False
    protection_on: bool = False  # over-current protection armed: over the limit trips
    tripped: bool = False
    load: Load = field(default=open_circuit)

    def operating_point(self) -> tuple[float, float]:
        """(voltage V, current A) at the output now; (0, 0) while off. Trips if armed and over."""
        if not self.output_on:
            return 0.0, 0.0
        demand_a = self.load(self.set_voltage_v)
        if abs(demand_a) <= self.current_limit_a:
            return self.set_voltage_v, demand_a
        if self.protection_on:
            self.output_on = False
            self.tripped = True
            return 0.0, 0.0
        voltage_v = self._constant_current_voltage_v()
        return voltage_v, self.load(voltage_v)

    def in_constant_current(self) -> bool:
        if not self.output_on:
            return False
        return abs(self.load(self.set_voltage_v)) > self.current_limit_a

    def _constant_current_voltage_v(self) -> float:
        """The voltage between 0 and the set voltage at which the load draws the limit."""
        low_v, high_v = 0.0, self.set_voltage_v
        for _ in range(_BISECTION_STEPS):
            mid_v = 0.5 * (low_v + high_v)
            if abs(self.load(mid_v)) > self.current_limit_a:
                high_v = mid_v
            else:
                low_v = mid_v
        return low_v


@dataclass
class SimSupply:
    """A DC supply with `channel_count` outputs, numbered from 1, and its command log."""

    channel_count: int = 2
    min_voltage_v: float = -30.0
    max_voltage_v: float = 30.0
    max_current_a: float = 3.0
    channels: list[SupplyChannel] = field(default_factory=list)
    command_log: list[str] = field(default_factory=list)
    # Standard deviation of each current reading (A): the meter's noise, seeded.
    current_noise_a: float = 0.0
    seed: object = 0

    def __post_init__(self) -> None:
        if self.channel_count < 1:
            raise ValueError(f"SimSupply: {self.channel_count} channels; needs at least 1")
        if not self.channels:
            self.channels = [SupplyChannel() for _ in range(self.channel_count)]
        self._rng = np.random.default_rng(self.seed)

    def read_current_a(self, number: int) -> float:
        """A current reading of channel `number`: its current plus the reading noise (0 while off)."""
        channel = self.channel(number)
        current_a = channel.operating_point()[1]
        if not channel.output_on or self.current_noise_a == 0.0:
            return current_a
        return current_a + float(self._rng.normal(0.0, self.current_noise_a))

    def channel(self, number: int) -> SupplyChannel:
        if not 1 <= number <= self.channel_count:
            raise ValueError(f"channel {number} outside 1..{self.channel_count}")
        return self.channels[number - 1]

    def set_load(self, number: int, load: Load) -> None:
        """Connect `load` to channel `number`; an armed channel trips now if it is over its limit."""
        self.channel(number).load = load
        self.settle()

    def settle(self) -> None:
        """Bring every channel to its operating point (trips happen here)."""
        for channel in self.channels:
            channel.operating_point()

    def reset(self) -> None:
        """*RST: outputs off, 0 V, default limit, protection disarmed, trips cleared; loads stay."""
        for channel in self.channels:
            load = channel.load
            channel.__init__(load=load)
