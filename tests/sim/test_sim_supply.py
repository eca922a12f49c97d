"""The simulated DC supply: constant voltage, constant current at the limit, an armed trip, and its
front panel in both command trees."""

from __future__ import annotations

import math

import pytest

from tonebench.sim.supply import SimSupply, SupplyChannel, resistor
from tonebench.sim.supply_panel import SimSupplyPanel


def panel_with(load_ohm: float, channel: int = 1) -> tuple[SimSupply, SimSupplyPanel]:
    supply = SimSupply(channel_count=2)
    supply.set_load(channel, resistor(load_ohm))
    return supply, SimSupplyPanel(supply)


def test_constant_voltage_below_the_limit():
    # Ohm's law: 5 V across 100 ohm draws 50 mA, under a 100 mA limit.
    channel = SupplyChannel(set_voltage_v=5.0, current_limit_a=0.1, output_on=True, load=resistor(100.0))
    assert channel.operating_point() == (5.0, 0.05)
    assert not channel.in_constant_current()


def test_constant_current_at_the_limit():
    # 10 V across 10 ohm would draw 1 A; held at 0.2 A the voltage is I*R = 2 V (Ohm's law).
    channel = SupplyChannel(set_voltage_v=10.0, current_limit_a=0.2, output_on=True, load=resistor(10.0))
    voltage_v, current_a = channel.operating_point()
    assert math.isclose(voltage_v, 2.0, rel_tol=1e-9)
    assert math.isclose(current_a, 0.2, rel_tol=1e-9)
    assert channel.in_constant_current() and not channel.tripped


def test_negative_gate_voltage_under_compliance():
    # A depletion-mode gate at -3 V through 1 kohm draws -3 mA, inside a 10 mA limit.
    channel = SupplyChannel(set_voltage_v=-3.0, current_limit_a=0.01, output_on=True, load=resistor(1e3))
    assert channel.operating_point() == (-3.0, -0.003)


def test_armed_protection_trips_and_latches():
    channel = SupplyChannel(set_voltage_v=10.0, current_limit_a=0.2, output_on=True, protection_on=True,
                            load=resistor(10.0))
    assert channel.operating_point() == (0.0, 0.0)
    assert channel.tripped and not channel.output_on
    channel.load = resistor(1e6)  # the fault went away: the trip stays latched
    assert channel.operating_point() == (0.0, 0.0) and channel.tripped


def test_bad_channel_and_load():
    with pytest.raises(ValueError, match="outside 1..2"):
        SimSupply(channel_count=2).channel(3)
    with pytest.raises(ValueError, match="> 0"):
        resistor(0.0)


def test_panel_standard_tree_selects_channels():
    supply, panel = panel_with(100.0, channel=2)
    replies = [panel.handle_line(line) for line in (
        "INST:NSEL 2;:VOLT 5;:CURR 0.1;:OUTP ON", "INST:NSEL 2;:MEAS:CURR?", "INST:NSEL 1;:MEAS:CURR?",
        "INSTrument:NSELect?", "INST OUT2;:SOURce:VOLTage:LEVel:IMMediate:AMPLitude?", "SYST:ERR?")]
    assert replies == [None, "0.05", "0.0", "1", "5.0", '0,"No error"']
    assert supply.channel(1).set_voltage_v == 0.0  # channel 1 untouched


def test_panel_trip_query_clear_and_refused_output():
    supply, panel = panel_with(10.0)
    panel.handle_line("VOLT 10;CURR 0.2;CURR:PROT:STAT ON;:OUTP ON")
    assert panel.handle_line("CURR:PROT:TRIP?") == "1"
    assert panel.handle_line("OUTP?") == "0"
    panel.handle_line("OUTP ON")  # refused while tripped
    assert panel.handle_line("SYST:ERR?").startswith('-221,')
    supply.set_load(1, resistor(1e3))
    panel.handle_line("CURR:PROT:CLE;:OUTP ON")
    assert panel.handle_line("CURR:PROT:TRIP?;:OUTP?") == "0;1"
    assert panel.handle_line("MEAS:CURR?") == repr(10.0 / 1e3)


def test_panel_smu_tree_with_suffixes():
    supply, panel = panel_with(10.0, channel=2)
    panel.handle_line(":SOUR2:VOLT:LEV 10.0;:SENS2:CURR:PROT 0.2;:OUTP2 ON")
    assert panel.handle_line(":MEAS2:VOLT?;:MEAS2:CURR?") == f"{2.0!r};{0.2!r}"
    assert supply.channel(2).current_limit_a == 0.2 and supply.channel(1).output_on is False
    assert panel.handle_line("SYST:ERR?") == '0,"No error"'
    # What was received is logged as sent, before any rewriting.
    assert supply.command_log[0] == ":SOUR2:VOLT:LEV 10.0;:SENS2:CURR:PROT 0.2;:OUTP2 ON"


@pytest.mark.parametrize("line, code", [
    ("VOLT 31", "-222"), ("CURR 0", "-222"), ("CURR 3.5", "-222"), ("INST:NSEL 3", "-222"),
    ("VOLT 1 HZ", "-131"), ("INST OUT9", "-222"),
])
def test_panel_refuses_out_of_range(line, code):
    supply, panel = panel_with(100.0)
    panel.handle_line(line)
    assert panel.handle_line("SYST:ERR?").startswith(code + ",")
    assert supply.channel(1).set_voltage_v == 0.0


def test_reset_keeps_loads():
    supply, panel = panel_with(100.0)
    panel.handle_line("VOLT 5;CURR 1;CURR:PROT:STAT ON;:OUTP ON")
    panel.handle_line("*RST")
    channel = supply.channel(1)
    assert (channel.set_voltage_v, channel.output_on, channel.protection_on) == (0.0, False, False)
    assert channel.load(5.0) == 0.05


def test_constant_current_with_a_callable_square_law_load():
    # A square-law load I = k V^2 (the textbook saturated-FET form) held at the limit I_lim sits
    # at V = sqrt(I_lim / k): k = 0.05 A/V^2, I_lim = 0.2 A -> V = 2 V.
    channel = SupplyChannel(set_voltage_v=5.0, current_limit_a=0.2, output_on=True,
                            load=lambda voltage_v: 0.05 * voltage_v * abs(voltage_v))
    voltage_v, current_a = channel.operating_point()
    assert math.isclose(voltage_v, 2.0, rel_tol=1e-9) and math.isclose(current_a, 0.2, rel_tol=1e-9)


def test_constant_current_at_a_negative_voltage():
    # -10 V across 10 ohm would draw -1 A; held at 0.2 A the voltage is -I*R = -2 V.
    channel = SupplyChannel(set_voltage_v=-10.0, current_limit_a=0.2, output_on=True, load=resistor(10.0))
    voltage_v, current_a = channel.operating_point()
    assert math.isclose(voltage_v, -2.0, rel_tol=1e-9) and math.isclose(current_a, -0.2, rel_tol=1e-9)
