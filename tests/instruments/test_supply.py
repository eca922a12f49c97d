"""The DC supply role driver against the simulated supply over TCP through pyvisa-py, in the
generic (INSTrument:NSELect) and the SMU (channel suffix) dialects; the dialect files load and
a wrong one is refused in one line."""

from __future__ import annotations

import re
import threading
from collections.abc import Iterator
from pathlib import Path

import pytest

from tonebench.errors import InputError, InstrumentError
from tonebench.instruments.dialect import load_dialect
from tonebench.instruments.scpi import LimitError, ScpiInstrument
from tonebench.instruments.supply import DcSupply, SupplyTripped
from tonebench.instruments.transport import connect
from tonebench.sim.server import InstrumentServer
from tonebench.sim.supply import SimSupply, resistor
from tonebench.sim.supply_panel import SimSupplyPanel

GATE, DRAIN = 1, 2

# The standard SCPI power-supply headers (SCPI-1999 vol 4, SOURce/OUTPut/MEASure/INSTrument, from
# memory), short form: every line the generic dialect sends must consist of only these.
STANDARD_UNIT = re.compile(
    r":?(\*IDN\?|\*CLS|\*OPC\?|SYST:ERR\?|INST:NSEL \d+|VOLT -?\d+\.\d+|CURR [-+.\deE]+|"
    r"CURR:PROT:STAT ON|OUTP (ON|OFF)|OUTP\?|MEAS:(VOLT|CURR)\?|CURR:PROT:TRIP\?)"
)


@pytest.fixture
def bench() -> Iterator[tuple[SimSupply, str]]:
    supply = SimSupply(channel_count=2)
    with InstrumentServer(SimSupplyPanel(supply), threading.RLock()) as server:
        yield supply, server.resource


def open_channel(resource: str, dialect_name: str, channel: int) -> DcSupply:
    dialect = load_dialect(dialect_name)
    handle, _idn = connect(resource, dialect, f"supply{channel}")
    return DcSupply(ScpiInstrument(handle, dialect, f"supply{channel}"), channel)


@pytest.fixture
def opened() -> Iterator[list[DcSupply]]:
    drivers: list[DcSupply] = []
    yield drivers
    for driver in drivers:
        driver.instrument.close()


def test_generic_bias_up_and_down_with_standard_commands_only(bench, opened):
    supply, resource = bench
    supply.set_load(GATE, resistor(1e6))    # a gate draws almost nothing
    supply.set_load(DRAIN, resistor(100.0))
    gate = open_channel(resource, "generic-supply", GATE)
    drain = open_channel(resource, "generic-supply", DRAIN)
    opened.extend([gate, drain])
    assert gate.idn == "tonebench,simulated DC supply,SIM-PS-0001,0.1"
    for driver, voltage_v, limit_a in ((gate, -2.0, 1e-3), (drain, 5.0, 0.2)):
        driver.prepare()
        driver.set_current_limit(limit_a)
        driver.set_voltage(voltage_v)
        driver.output_on()
    # Ohm's law on the simulated loads: 5 V / 100 ohm = 50 mA; -2 V / 1 Mohm = -2 uA.
    assert drain.measure_current_a() == pytest.approx(0.05, rel=1e-12)
    assert drain.measure_voltage_v() == pytest.approx(5.0, rel=1e-12)
    assert gate.measure_current_a() == pytest.approx(-2e-6, rel=1e-12)
    assert gate.tripped() is False
    drain.output_off()
    gate.output_off()
    assert not supply.channel(GATE).output_on and not supply.channel(DRAIN).output_on
    units = [unit for line in supply.command_log for unit in line.split(";")]
    odd = [unit for unit in units if not STANDARD_UNIT.fullmatch(unit)]
    assert odd == [] and len(units) > 30
    # Every setting is followed by *OPC? (wait_complete) before the error queue is read.
    volt = next(i for i, line in enumerate(supply.command_log) if ":VOLT 5.000000" in line)
    assert supply.command_log[volt + 1:volt + 3] == ["*OPC?", "SYST:ERR?"]


def test_trip_is_a_fault_not_zero_bias(bench, opened):
    supply, resource = bench
    supply.set_load(DRAIN, resistor(100.0))
    drain = open_channel(resource, "generic-supply", DRAIN)
    opened.append(drain)
    drain.prepare()
    drain.set_current_limit(0.1)
    drain.set_voltage(5.0)
    drain.output_on()
    assert drain.measure_current_a() == pytest.approx(0.05)
    supply.set_load(DRAIN, resistor(10.0))  # a short-ish fault: 0.5 A wanted, 0.1 A allowed
    with pytest.raises(SupplyTripped, match="supply2: channel 2 tripped .* 0.1 A"):
        drain.measure_current_a()
    assert isinstance(SupplyTripped("x"), InstrumentError)
    assert drain.tripped() is True
    # Output on while tripped is refused by the driver before it is sent (the panel would refuse too).
    sent_before = list(supply.command_log)
    with pytest.raises(SupplyTripped, match="still tripped; output on refused"):
        drain.output_on()
    assert [line for line in supply.command_log[len(sent_before):] if "OUTP ON" in line] == []


def test_trip_at_switch_on(bench, opened):
    supply, resource = bench
    supply.set_load(DRAIN, resistor(1.0))
    drain = open_channel(resource, "generic-supply", DRAIN)
    opened.append(drain)
    drain.prepare()
    drain.set_current_limit(0.1)
    drain.set_voltage(1.0)
    with pytest.raises(SupplyTripped, match="tripped"):
        drain.output_on()


def test_limits_refused_before_anything_is_sent(bench, opened):
    supply, resource = bench
    gate = open_channel(resource, "generic-supply", GATE)
    opened.append(gate)
    sent_before = list(supply.command_log)
    for call, value, text in ((gate.set_voltage, 30.5, "voltage 30.5 V outside the generic-supply range "
                               "-30..30 V"), (gate.set_voltage, -31.0, "min_voltage_v"),
                              (gate.set_current_limit, 3.5, "current limit 3.5 A"),
                              (gate.set_current_limit, 0.0, "min_current_a")):
        with pytest.raises(LimitError, match=text):
            call(value)
    assert supply.command_log == sent_before
    with pytest.raises(InstrumentError, match="set the voltage and current limit first"):
        gate.output_on()
    assert supply.command_log == sent_before


def test_smu_dialect_against_the_same_panel(bench, opened):
    supply, resource = bench
    supply.set_load(DRAIN, resistor(10.0))
    drain = open_channel(resource, "generic-smu", DRAIN)
    opened.append(drain)
    drain.prepare()
    drain.set_current_limit(0.2)
    drain.set_voltage(10.0)
    drain.output_on()
    # In compliance the SMU holds 0.2 A and the voltage falls to I*R = 2 V (Ohm's law).
    assert drain.measure_current_a() == pytest.approx(0.2, rel=1e-9)
    assert drain.measure_voltage_v() == pytest.approx(2.0, rel=1e-9)
    assert drain.tripped() is None  # the SMU dialect has no trip query
    assert supply.channel(GATE).set_voltage_v == 0.0
    assert any(line.startswith(":SOUR2:VOLT:LEV 10.000000") for line in supply.command_log)
    assert not any("INST" in line for line in supply.command_log)
    # No trip query: an output that went off unasked is still the fault.
    supply.channel(DRAIN).output_on = False
    with pytest.raises(SupplyTripped, match="output is off, expected on"):
        drain.measure_current_a()


def test_restore_after_reopen(bench, opened):
    supply, resource = bench
    supply.set_load(DRAIN, resistor(100.0))
    drain = open_channel(resource, "generic-supply", DRAIN)
    opened.append(drain)
    drain.prepare()
    drain.set_current_limit(0.1)
    drain.set_voltage(3.0)
    drain.output_on()
    supply.reset()  # the supply lost its settings (power cycle)
    drain.instrument.reopen()
    channel = supply.channel(DRAIN)
    assert (channel.set_voltage_v, channel.current_limit_a, channel.output_on, channel.protection_on) == (
        3.0, 0.1, True, True)
    assert drain.measure_current_a() == pytest.approx(0.03)


@pytest.mark.parametrize("name", ["generic-supply", "generic-smu"])
def test_shipped_dialects_load(name):
    dialect = load_dialect(name)
    assert dialect.role == "supply" and dialect.name == name
    assert dialect.limits["min_voltage_v"] < 0.0 < dialect.limits["max_voltage_v"]
    common = {"identify", "clear_status", "wait_complete", "next_error"}
    for op_name, op in dialect.operations.items():
        # Every output operation names its channel; the common ones are for the whole instrument.
        assert ("{channel}" in op.template) == (op_name not in common), op_name


SUPPLY = Path(__file__).resolve().parents[2] / "drivers" / "generic-supply.toml"


@pytest.mark.parametrize("old, new, message", [
    ("max_current_a = 3.0\n", "", "field 'limits.max_current_a' is missing"),
    ("max_current_a", "max_curent_a", "did you mean max_current_a"),
    ("measure_current   = ", "measure_amps   = ", "field 'operations.measure_current' is missing"),
    ("{voltage_v:.6f}", "{volts:.6f}", "unknown template field {volts}; allowed: channel, voltage_v"),
])
def test_a_wrong_supply_dialect_is_refused_in_one_line(tmp_path, old, new, message):
    text = SUPPLY.read_text(encoding="utf-8")
    assert old in text
    path = tmp_path / "bad-supply.toml"
    path.write_text(text.replace(old, new, 1), encoding="utf-8")
    with pytest.raises(InputError) as caught:
        load_dialect(str(path))
    assert message in str(caught.value) and "\n" not in str(caught.value)


def test_generic_dialect_strings_against_a_dialogue(tmp_path):
    """The exact strings, against a pyvisa-sim dialogue written by hand from the dialect file."""
    pyvisa = pytest.importorskip("pyvisa")
    from pyvisa_recorder import Recorder

    from conftest import PROJECT_ROOT
    from tonebench.instruments import open_resource

    yaml_path = tmp_path / "generic-supply.yaml"
    yaml_path.write_text((PROJECT_ROOT / "tests" / "dialogues" / "generic-supply.yaml").read_text())
    rm = pyvisa.ResourceManager(f"{yaml_path}@sim")
    try:
        dialect = load_dialect("generic-supply")
        inst = ScpiInstrument(Recorder(open_resource("TCPIP0::localhost::5030::SOCKET", dialect, "drain", f"{yaml_path}@sim")),
                              dialect, "drain")
        drain = DcSupply(inst, channel=2)
        assert drain.idn == "Example Co,Dialogue Supply,SN0301,1.0"
        drain.prepare()
        drain.set_current_limit(0.25)
        drain.set_voltage(4.5)
        drain.output_on()
        assert drain.measure_current_a() == 0.0421
        assert drain.measure_voltage_v() == 4.4998
        assert inst.resource.sent[-6:] == ["INST:NSEL 2;:MEAS:CURR?", "INST:NSEL 2;:CURR:PROT:TRIP?",
                                           "INST:NSEL 2;:OUTP?", "INST:NSEL 2;:MEAS:VOLT?",
                                           "INST:NSEL 2;:CURR:PROT:TRIP?", "INST:NSEL 2;:OUTP?"]
    finally:
        rm.close()
