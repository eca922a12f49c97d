"""Role drivers against pyvisa-sim instruments whose dialogues (tests/dialogues/*.yaml) list the
exact SCPI strings of each dialect file, written by hand. An unlisted string makes the simulated
instrument queue -113 "Undefined header", which the drivers' error drain turns into a failure."""

from __future__ import annotations

import shutil
import socket

import pytest
import pyvisa
from pyvisa_recorder import Recorder

from conftest import PROJECT_ROOT
from tonebench.errors import InputError, InstrumentError
from tonebench.instruments import (
    AnalyzerSetup,
    LimitError,
    ScpiInstrument,
    SignalSource,
    SpectrumAnalyzer,
    load_dialect,
    open_resource,
)
from tonebench.instruments.scpi import ScpiError, parse_reply

DIALOGUES = PROJECT_ROOT / "tests" / "dialogues"
SETUP = AnalyzerSetup(span_hz=100e3, rbw_hz=1e3, vbw_hz=1e3, atten_db=10.0, ref_level_dbm=-10.0)
CENTER_HZ = 1.0005e9
MARKERS_HZ = (1.000e9, 1.001e9)


@pytest.fixture
def open_sim(tmp_path):
    """open_sim(dialect, port, label) -> ScpiInstrument on a fresh copy of the dialect's YAML.

    pyvisa caches one simulated library per file path, so a copy per test gives fresh devices.
    """
    managers = []

    def _open(dialect_name: str, port: int, label: str) -> ScpiInstrument:
        yaml_path = tmp_path / f"{dialect_name}.yaml"
        if not yaml_path.exists():
            shutil.copy(DIALOGUES / f"{dialect_name}.yaml", yaml_path)
        rm = pyvisa.ResourceManager(f"{yaml_path}@sim")
        managers.append(rm)
        dialect = load_dialect(dialect_name)
        resource = open_resource(f"TCPIP0::localhost::{port}::SOCKET", dialect, label, f"{yaml_path}@sim")
        return ScpiInstrument(Recorder(resource), dialect, label)

    yield _open
    for rm in managers:
        rm.close()


# ---- reply parsing ---------------------------------------------------------------------------


def test_parse_reply_kinds():
    assert parse_reply("float", "-4.23700000E+01\n") == -42.37
    assert parse_reply("int", "+8") == 8
    assert parse_reply("int", "+8.00000E+00") == 8
    assert parse_reply("bool", "1") is True
    assert parse_reply("bool", "OFF") is False
    assert parse_reply("error", '-222,"Data out of range"') == ScpiError(-222, "Data out of range")
    assert parse_reply("text", " Example Co,X,1,2 ") == "Example Co,X,1,2"
    for kind, text in [("float", "9.91E37"), ("float", "nan"), ("int", "2.5"), ("bool", "2"),
                       ("error", "No error")]:
        with pytest.raises(ValueError):
            parse_reply(kind, text)


# ---- signal source ---------------------------------------------------------------------------


def test_source_tone_and_rf(open_sim):
    inst = open_sim("generic-source", 5025, "source1")
    source = SignalSource(inst)
    assert source.idn == "Example Co,Dialogue Source,SN0001,1.0"
    source.set_tone(1.0e9, -10.0)
    source.set_tone(1.001e9, -20.5)
    source.rf_on()
    assert source.rf_is_on() is True
    source.rf_off()
    assert source.rf_is_on() is False
    sent = inst.resource.sent
    # *OPC? after the settings, so the power is in force before set_tone returns
    tone = sent.index("SOUR:POW -10.00")
    assert "*OPC?" in sent[tone:sent.index("SOUR:FREQ 1001000000.000")]


def test_source_unlisted_string_raises_instrument_message(open_sim):
    source = SignalSource(open_sim("generic-source", 5025, "source1"))
    # A command error names the operations sent since the queue was last read (issue 9, item 5).
    with pytest.raises(InstrumentError, match=r"^source1: the instrument refused .*set_power \('SOUR:POW -11.00'\) "
                                              r"of dialect generic-source: -113, Undefined header$"):
        source.set_tone(1.0e9, -11.0)


def test_source_limits_checked_before_anything_is_sent(open_sim):
    inst = open_sim("generic-source", 5025, "source2")
    source = SignalSource(inst)
    inst.resource.sent.clear()
    with pytest.raises(LimitError, match="source2: power 25.00 dBm .*max_power_dbm"):
        source.set_tone(1.0e9, 25.0)
    with pytest.raises(LimitError, match="source2: frequency 10 GHz outside"):
        source.set_tone(10e9, -10.0)
    assert inst.resource.sent == []


def test_source_rf_off_confirmed_by_read_back(open_sim):
    source = SignalSource(open_sim("generic-source", 5026, "source1"))
    with pytest.raises(InstrumentError, match="source1: RF still on"):
        source.rf_off()


def test_source_garbled_reply_names_operation(open_sim):
    source = SignalSource(open_sim("generic-source", 5027, "source1"))
    with pytest.raises(InstrumentError, match=r"source1: read_rf \('OUTP\?'\) replied 'maybe'"):
        source.rf_is_on()


def test_wait_complete_timeout_restores_visa_timeout(open_sim):
    inst = open_sim("generic-source", 5027, "source1")
    before_ms = inst.resource.timeout
    with pytest.raises(InstrumentError, match="source1: no reply to wait_complete .* 0.05 s"):
        inst.wait_complete(0.05)
    assert inst.resource.timeout == before_ms == 5000


def test_missing_operation(open_sim):
    inst = open_sim("generic-source", 5025, "source1")
    assert not inst.has("set_center")
    with pytest.raises(InstrumentError, match="source1: .*no operation 'set_center'"):
        inst.call("set_center", freq_hz=1e9)


# ---- spectrum analyzer -----------------------------------------------------------------------

# (dialect, the rbw command for 3 kHz, the error query), written by hand from the dialect files
ANALYZERS = [
    ("generic-analyzer", "BAND 3000.000", "SYST:ERR?", "FREQ:CENT 1000500000.000"),
    (
        "verbose-analyzer",
        "SENSe:BANDwidth:RESolution 3000 HZ",
        "SYSTem:ERRor:NEXT?",
        "SENSe:FREQuency:CENTer 1000500000 HZ",
    ),
]


@pytest.mark.parametrize("dialect_name", [a[0] for a in ANALYZERS])
def test_analyzer_sweep_and_markers(open_sim, dialect_name):
    analyzer = SpectrumAnalyzer(open_sim(dialect_name, 5025, "analyzer1"))
    analyzer.prepare()
    analyzer.apply(SETUP)
    reading = analyzer.read_markers(CENTER_HZ, MARKERS_HZ)
    assert reading.powers_dbm == (-42.37, -42.37)
    assert reading.overload is False  # status 4: bit 2 set, overload bit 3 clear
    assert reading.sweep_time_s == 0.025


@pytest.mark.parametrize(("dialect_name", "rbw_3k", "error_query", "center"), ANALYZERS)
def test_analyzer_sends_only_changes(open_sim, dialect_name, rbw_3k, error_query, center):
    inst = open_sim(dialect_name, 5025, "analyzer1")
    analyzer = SpectrumAnalyzer(inst)
    analyzer.apply(SETUP)
    inst.resource.sent.clear()
    analyzer.apply(AnalyzerSetup(100e3, 3e3, 1e3, 10.0, -10.0))
    assert inst.resource.sent == [rbw_3k, error_query]

    analyzer.read_markers(CENTER_HZ, MARKERS_HZ)
    analyzer.read_markers(CENTER_HZ, MARKERS_HZ)
    assert inst.resource.sent.count(center) == 1

    analyzer.forget_state()
    inst.resource.sent.clear()
    analyzer.apply(SETUP)
    assert len(inst.resource.sent) == 5 + 1  # every setting, then the error query


@pytest.mark.parametrize("dialect_name", [a[0] for a in ANALYZERS])
def test_analyzer_overload_bit(open_sim, dialect_name):
    analyzer = SpectrumAnalyzer(open_sim(dialect_name, 5026, "analyzer1"))
    reading = analyzer.read_markers(CENTER_HZ, [1.000e9])
    assert reading.overload is True
    assert reading.powers_dbm == (-3.10,)


@pytest.mark.parametrize("dialect_name", [a[0] for a in ANALYZERS])
def test_analyzer_garbled_marker(open_sim, dialect_name):
    analyzer = SpectrumAnalyzer(open_sim(dialect_name, 5027, "analyzer1"))
    # 9.91E37 is the instrument's not-a-number: an impossible reading, not a garbled line (issue 9)
    expected = "analyzer1: read_marker_power .* replied .*(expected a number|not-a-number)"
    with pytest.raises(InstrumentError, match=expected):
        analyzer.read_markers(CENTER_HZ, [1.000e9])


@pytest.mark.parametrize("dialect_name", [a[0] for a in ANALYZERS])
def test_analyzer_scpi_error_then_full_resend(open_sim, dialect_name):
    inst = open_sim(dialect_name, 5025, "analyzer1")
    analyzer = SpectrumAnalyzer(inst)
    analyzer.apply(SETUP)
    # 12 dB is not in the dialogue, so the instrument queues its own error message
    with pytest.raises(InstrumentError, match=r"^analyzer1: the instrument refused set_attenuation .*: -113, Undefined header$"):
        analyzer.apply(AnalyzerSetup(100e3, 1e3, 1e3, 12.0, -10.0))
    inst.resource.sent.clear()
    analyzer.apply(SETUP)
    assert len(inst.resource.sent) == 5 + 1


def test_analyzer_attenuation_limit(open_sim):
    analyzer = SpectrumAnalyzer(open_sim("generic-analyzer", 5025, "analyzer1"))
    with pytest.raises(LimitError, match="attenuation 80 dB"):
        analyzer.apply(AnalyzerSetup(100e3, 1e3, 1e3, 80.0, -10.0))


def test_predicted_sweep_time():
    analyzer = SpectrumAnalyzer(ScpiInstrument(None, load_dialect("generic-analyzer"), "analyzer1"))
    # design section 5: k * span / RBW^2 with k = 2.5 from the dialect: 2.5 * 1e5 / 1e6
    assert analyzer.predicted_sweep_time_s(SETUP) == pytest.approx(0.25)


# ---- transport -------------------------------------------------------------------------------


def test_malformed_resource_string():
    dialect = load_dialect("generic-source")
    expected = "'localhost:5025' is not a VISA resource.*TCPIP0::host::port::SOCKET"
    with pytest.raises(InputError, match=expected):
        open_resource("localhost:5025", dialect, "source1")


def test_nothing_listening_is_cannot_reach():
    # a port that was free a moment ago: bind to port 0, read it, close it
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    resource = f"TCPIP0::127.0.0.1::{port}::SOCKET"
    with pytest.raises(InputError, match=f"cannot reach {resource} \\(source1\\): "):
        open_resource(resource, load_dialect("generic-source"), "source1")

