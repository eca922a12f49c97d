"""The power meter role driver: its dialect's exact strings against a pyvisa-sim dialogue written by
hand, and the same driver against the simulated bench's power meter over TCP."""

from __future__ import annotations

import shutil

import pytest
import pyvisa
from pyvisa_recorder import Recorder

from conftest import PROJECT_ROOT
from tonebench.errors import InstrumentError
from tonebench.instruments import (
    LimitError,
    ScpiInstrument,
    load_dialect,
    open_resource,
)
from tonebench.instruments.power_meter import PowerMeter
from tonebench.sim.launch import start_sim_bench
from tonebench.sim.scenario import Scenario

DIALOGUES = PROJECT_ROOT / "tests" / "dialogues"


@pytest.fixture
def dialogue_meter(tmp_path):
    managers = []

    def _open(port: int) -> ScpiInstrument:
        yaml_path = tmp_path / "generic-power-meter.yaml"
        if not yaml_path.exists():
            shutil.copy(DIALOGUES / "generic-power-meter.yaml", yaml_path)
        rm = pyvisa.ResourceManager(f"{yaml_path}@sim")
        managers.append(rm)
        dialect = load_dialect("generic-power-meter")
        return ScpiInstrument(Recorder(open_resource(f"TCPIP0::localhost::{port}::SOCKET", dialect, "power_meter", f"{yaml_path}@sim")),
                              dialect, "power_meter")

    yield _open
    for rm in managers:
        rm.close()


def test_power_meter_dialect_strings(dialogue_meter):
    inst = dialogue_meter(5025)
    meter = PowerMeter(inst)
    assert meter.idn == "Example Co,Dialogue Power Meter,SN0201,1.0"
    meter.prepare()
    assert meter.read_power_dbm(2.40e9) == -6.482
    assert meter.read_power_dbm(2.40e9) == -6.482
    assert meter.read_power_dbm(2.45e9) == -6.482
    sent = inst.resource.sent
    # The frequency is sent only when it changes; every reading is INIT, *OPC?, FETC?.
    assert sent.count("SENS:FREQ 2400000000") == 1 and sent.count("SENS:FREQ 2450000000") == 1
    first = sent.index("INIT:IMM")
    assert sent[first:first + 3] == ["INIT:IMM", "*OPC?", "FETC?"]


def test_power_meter_unlisted_string_is_an_error(dialogue_meter):
    meter = PowerMeter(dialogue_meter(5025))
    # A command error names the operations it may be about (issue 9, item 5).
    with pytest.raises(InstrumentError, match=r"^power_meter: the instrument refused .*set_frequency .*: -113, Undefined header$"):
        meter.read_power_dbm(2.41e9)  # "SENS:FREQ 2410000000" is not in the dialogue


def test_power_meter_reading_below_its_range_is_refused(dialogue_meter):
    meter = PowerMeter(dialogue_meter(5026))
    with pytest.raises(InstrumentError, match=r"read -71.30 dBm .*is the sensor connected"):
        meter.read_power_dbm(2.40e9)


def test_power_meter_frequency_limit_checked_before_sending(dialogue_meter):
    inst = dialogue_meter(5025)
    inst.resource.sent.clear()
    with pytest.raises(LimitError, match="power_meter: frequency 20 GHz outside"):
        PowerMeter(inst).read_power_dbm(20e9)
    assert inst.resource.sent == []


def test_driver_on_the_simulated_power_meter():
    """The driver against the simulated bench over TCP: the meter reads the DUT input plane."""
    scenario = Scenario.model_validate({"power_meter": {"accuracy_db": 0.0, "reading_noise_db": 0.0}})
    with start_sim_bench(scenario) as sim:
        dialect = load_dialect("generic-power-meter")
        meter = PowerMeter(ScpiInstrument(open_resource(sim.resources["power_meter"], dialect, "power_meter"), dialect, "power_meter"))
        try:
            meter.prepare()
            with sim.bench.lock:
                sim.bench.set_source(1, freq_hz=2.4e9, power_dbm=0.0, rf_on=True)
                sim.bench.settle_source(1)
            # The truth: source power less the true in1 loss (read from Python, not SCPI).
            expected_dbm = 0.0 - sim.bench.truth.true_loss_db("in1", 2.4e9)
            # A -70 dBm sensor floor under a -6.5 dBm tone adds 10*log10(1 + 10^-6.35) dB: nothing.
            assert meter.read_power_dbm(2.4e9) == pytest.approx(expected_dbm, abs=1e-4)
        finally:
            meter.instrument.close()
