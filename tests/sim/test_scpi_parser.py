"""Generic SCPI layer: headers, chains, parameters, error queue and common commands."""

from __future__ import annotations

import pytest

from tonebench.sim import scpi_parser as scpi
from tonebench.sim.scpi_parser import ScpiDevice, ScpiError, parse_bool, parse_number

MIN_FREQ_HZ = 9e3
MAX_FREQ_HZ = 6e9


class ToyInstrument(ScpiDevice):
    """A small source/analyzer mix that only stores what it is told."""

    def __init__(self) -> None:
        super().__init__("Toy Works,T1,0001,1.0")
        self.reset_count = 0
        self.settle_count = 0
        self.sweep_count = 0
        self.text = ""
        self.reset()
        self.command("[SOURce]:FREQuency[:CW]", self._set_freq, nparams=1)
        self.query("[SOURce]:FREQuency[:CW]", lambda p: f"{self.freq_hz:.1f}", nparams=0)
        self.command("[SOURce]:POWer[:LEVel][:AMPLitude]", self._set_power, nparams=1)
        self.query("[SOURce]:POWer[:LEVel][:AMPLitude]", lambda p: f"{self.power_dbm:.2f}", nparams=0)
        self.command("OUTPut[:STATe]", self._set_rf, nparams=1)
        self.query("OUTPut[:STATe]", lambda p: "1" if self.rf_on else "0", nparams=0)
        self.command("CALCulate#:MARKer#:X", self._set_marker, nparams=1)
        self.query("CALCulate#:MARKer#:X", lambda p: f"{self.marker_hz:.1f}", nparams=0)
        self.query("CALCulate#:MARKer#:Y", lambda p: "-42.50", nparams=0)
        self.command("DISPlay:WINDow#:TRACe:Y[:SCALe]:RLEVel", self._set_ref, nparams=1)
        self.command("DISPlay:TEXT", self._set_text, nparams=1)
        self.command("INITiate[:IMMediate]", self._sweep, nparams=0)

    def reset(self) -> None:
        self.reset_count += 1
        self.freq_hz = 1e9
        self.power_dbm = -20.0
        self.rf_on = False
        self.marker_hz = 0.0
        self.ref_dbm = 0.0

    def operation_complete(self) -> None:
        self.settle_count += 1

    def _set_freq(self, params: list[str]) -> None:
        freq_hz = parse_number(params[0], "HZ")
        if not MIN_FREQ_HZ <= freq_hz <= MAX_FREQ_HZ:
            raise ScpiError(scpi.DATA_OUT_OF_RANGE, "Data out of range")
        self.freq_hz = freq_hz

    def _set_power(self, params: list[str]) -> None:
        self.power_dbm = parse_number(params[0], "DBM")

    def _set_rf(self, params: list[str]) -> None:
        self.rf_on = parse_bool(params[0])

    def _set_marker(self, params: list[str]) -> None:
        self.marker_hz = parse_number(params[0], "HZ")

    def _set_ref(self, params: list[str]) -> None:
        self.ref_dbm = parse_number(params[0], "DBM")

    def _set_text(self, params: list[str]) -> None:
        self.text = params[0]

    def _sweep(self, params: list[str]) -> None:
        self.sweep_count += 1


def drain_errors(device: ScpiDevice) -> list[int]:
    """Read the error queue until '0,"No error"', returning the codes in the order read."""
    codes = []
    while True:
        code = int(device.handle_line("SYST:ERR?").split(",", 1)[0])
        if code == 0:
            return codes
        codes.append(code)


@pytest.fixture
def toy() -> ToyInstrument:
    return ToyInstrument()


# --- headers: SCPI-1999 vol 1 6.2 (from memory): short or long form, any case, optional nodes,
# numeric suffixes on nodes that take them.


@pytest.mark.parametrize(
    "line",
    [
        "SOUR:FREQ 2e9",  # short form
        "SOURCE:FREQUENCY 2e9",  # long form
        "source:frequency:cw 2e9",  # lower case, optional node present
        "SoUr:FrEqUeNcY:Cw 2e9",  # mixed case
        "FREQ 2e9",  # optional root node omitted
        ":FREQ:CW 2e9",  # leading colon, optional root omitted, optional leaf present
        "SOURce:FREQuency:CW 2e9",
    ],
)
def test_header_forms_reach_the_same_command(toy: ToyInstrument, line: str) -> None:
    assert toy.handle_line(line) is None
    assert toy.freq_hz == 2e9
    assert drain_errors(toy) == []


@pytest.mark.parametrize("line", ["POW -3", "SOUR:POW:LEV -3", "POWER:AMPL -3", "SOUR:POW:LEV:AMPL -3", "POW:AMPLITUDE -3"])
def test_several_optional_nodes(toy: ToyInstrument, line: str) -> None:
    toy.handle_line(line)
    assert toy.power_dbm == -3.0
    assert drain_errors(toy) == []


@pytest.mark.parametrize("line", ["FREQU 2e9", "SOURC:FREQ 2e9", "SOUR:FREQ:C 2e9", "SOUR:SOUR:FREQ 2e9", "FREQ:CW:CW 2e9"])
def test_forms_between_short_and_long_or_repeated_nodes_are_undefined(toy: ToyInstrument, line: str) -> None:
    # SCPI-1999 vol 1 6.2.1 (from memory): only the exact short or the exact long form is legal.
    toy.handle_line(line)
    assert toy.freq_hz == 1e9
    assert drain_errors(toy) == [scpi.UNDEFINED_HEADER]


@pytest.mark.parametrize(
    "line", ["CALC:MARK:X 1.5e9", "CALC1:MARK1:X 1.5e9", "CALCulate1:MARKer1:X 1.5e9", "calc:marker1:x 1.5e9"]
)
def test_numeric_suffix_one_or_absent(toy: ToyInstrument, line: str) -> None:
    toy.handle_line(line)
    assert toy.marker_hz == 1.5e9
    assert drain_errors(toy) == []


@pytest.mark.parametrize("line", ["CALC2:MARK:X 1e9", "CALC1:MARK0:X 1e9", "DISP:WIND3:TRAC:Y:RLEV -10"])
def test_numeric_suffix_other_than_one_is_out_of_range(toy: ToyInstrument, line: str) -> None:
    toy.handle_line(line)
    assert toy.marker_hz == 0.0 and toy.ref_dbm == 0.0
    assert drain_errors(toy) == [scpi.HEADER_SUFFIX_OUT_OF_RANGE]


def test_numeric_suffix_on_a_node_without_one_is_undefined(toy: ToyInstrument) -> None:
    toy.handle_line("SOUR:FREQ1 2e9")
    assert toy.freq_hz == 1e9
    assert drain_errors(toy) == [scpi.UNDEFINED_HEADER]


@pytest.mark.parametrize(
    "line", ["DISP:WIND:TRAC:Y:RLEV -10.0", "DISPlay:WINDow1:TRACe:Y:SCALe:RLEVel -10.0 DBM", "disp:wind1:trac:y:scal:rlev -10"]
)
def test_deep_header_with_optional_inner_node(toy: ToyInstrument, line: str) -> None:
    toy.handle_line(line)
    assert toy.ref_dbm == -10.0
    assert drain_errors(toy) == []


def test_query_and_command_are_separate(toy: ToyInstrument) -> None:
    # CALC:MARK:Y exists only as a query; INIT only as a command.
    assert toy.handle_line("CALC:MARK:Y?") == "-42.50"
    toy.handle_line("CALC:MARK:Y -1")
    assert toy.handle_line("INIT?") is None
    assert drain_errors(toy) == [scpi.UNDEFINED_HEADER, scpi.UNDEFINED_HEADER]


@pytest.mark.parametrize("line", ["SOUR::FREQ 1", "SOUR:FREQ?? ", "FR?EQ 1", "SOUR:1FREQ 1", ":"])
def test_malformed_headers_are_syntax_errors(toy: ToyInstrument, line: str) -> None:
    assert toy.handle_line(line) is None
    assert drain_errors(toy) == [scpi.SYNTAX_ERROR]


def test_tab_separates_header_and_parameter(toy: ToyInstrument) -> None:
    toy.handle_line("FREQ\t3e9")
    assert toy.freq_hz == 3e9


# --- chains: SCPI-1999 vol 1 6.2.4 (from memory): ';' separates units; a unit without a leading
# ':' continues at the path of the previous command; ':' restarts at the root; common commands
# leave the path alone; every new line starts at the root.


def test_chain_continues_at_previous_path(toy: ToyInstrument) -> None:
    # Y alone is not a root header, so only path continuation (CALC:MARK:) makes it valid.
    assert toy.handle_line("CALC:MARK:X 2e9;Y?") == "-42.50"
    assert toy.marker_hz == 2e9
    assert drain_errors(toy) == []


def test_chain_without_colon_does_not_reach_root_headers(toy: ToyInstrument) -> None:
    toy.handle_line("CALC:MARK:X 2e9;OUTP ON")  # resolves to CALC:MARK:OUTP
    assert toy.rf_on is False
    assert drain_errors(toy) == [scpi.UNDEFINED_HEADER]


def test_rooted_unit_after_semicolon(toy: ToyInstrument) -> None:
    toy.handle_line("CALC:MARK:X 2e9;:OUTP ON;:SOUR:POW -7")
    assert (toy.marker_hz, toy.rf_on, toy.power_dbm) == (2e9, True, -7.0)
    toy.handle_line("CALC:MARK:X 3e9;:Y?")  # rooted Y does not exist
    assert drain_errors(toy) == [scpi.UNDEFINED_HEADER]


def test_common_command_keeps_the_path(toy: ToyInstrument) -> None:
    assert toy.handle_line("CALC1:MARK1:X 2e9;*OPC;X?") == "2000000000.0"
    assert toy.settle_count == 1


def test_path_continuation_through_optional_root(toy: ToyInstrument) -> None:
    toy.handle_line("SOUR:FREQ 2e9;POW -5;FREQ:CW 3e9")
    assert (toy.freq_hz, toy.power_dbm) == (3e9, -5.0)
    assert drain_errors(toy) == []


def test_new_line_starts_at_root(toy: ToyInstrument) -> None:
    toy.handle_line("CALC:MARK:X 2e9")
    assert toy.handle_line("Y?") is None
    assert drain_errors(toy) == [scpi.UNDEFINED_HEADER]


def test_several_queries_in_one_line_are_joined(toy: ToyInstrument) -> None:
    toy.handle_line("FREQ 2.5e9;POW -12.5;OUTP ON")
    assert toy.handle_line("FREQ?;POW?;:OUTP?;*IDN?") == "2500000000.0;-12.50;1;Toy Works,T1,0001,1.0"


def test_error_drops_the_rest_of_the_line_but_keeps_earlier_replies(toy: ToyInstrument) -> None:
    assert toy.handle_line("FREQ 2e9;BOGUS 1;POW -5") is None
    assert (toy.freq_hz, toy.power_dbm) == (2e9, -20.0)
    assert toy.handle_line("FREQ?;BOGUS?;POW?") == "2000000000.0"
    assert drain_errors(toy) == [scpi.UNDEFINED_HEADER, scpi.UNDEFINED_HEADER]


def test_semicolon_inside_quotes_does_not_split(toy: ToyInstrument) -> None:
    assert toy.handle_line('DISP:TEXT "a;b, c";*OPC?') == "1"
    assert toy.text == '"a;b, c"'
    toy.handle_line("DISP:TEXT 'it''s;x'")
    assert toy.text == "'it''s;x'"
    assert drain_errors(toy) == []


def test_unterminated_string_is_an_error(toy: ToyInstrument) -> None:
    assert toy.handle_line('DISP:TEXT "abc;*OPC?') is None
    assert toy.text == ""
    assert drain_errors(toy) == [scpi.INVALID_STRING_DATA]


# --- parameters: IEEE 488.2 7.7.2/7.7.3 and SCPI-1999 vol 1 7.7.3 (from memory) for numbers and
# suffixes; M is milli except in MHZ, where it is mega, MA is mega.


@pytest.mark.parametrize(
    ("token", "unit", "expected"),
    [
        ("1.5", None, 1.5),
        (" +.5 ", None, 0.5),
        ("-7", None, -7.0),
        ("1.5e9", "HZ", 1.5e9),
        ("1.5E+9", "HZ", 1.5e9),
        ("2.4GHZ", "HZ", 2.4e9),
        ("2.4 GHz", "HZ", 2.4e9),
        ("100 kHz", "HZ", 100e3),
        ("3MHZ", "HZ", 3e6),
        ("3 MAHZ", "HZ", 3e6),
        ("50 hz", "HZ", 50.0),
        ("-30DBM", "DBM", -30.0),
        ("-30", "DBM", -30.0),
        ("10 DB", "DB", 10.0),
        ("5MS", "S", 5e-3),
        ("1e-3 S", "S", 1e-3),
        ("20 us", "S", 20e-6),
        ("7 NS", "S", 7e-9),
        ("250 MV", "V", 0.25),
        ("15 MA", "A", 15e-3),
    ],
)
def test_parse_number(token: str, unit: str | None, expected: float) -> None:
    assert parse_number(token, unit) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("token", "unit", "code"),
    [
        ("10 DB", "DBM", scpi.INVALID_SUFFIX),
        ("10 DBM", "DB", scpi.INVALID_SUFFIX),
        ("1 GHZ", "S", scpi.INVALID_SUFFIX),
        ("5 XYZ", "HZ", scpi.INVALID_SUFFIX),
        ("5 MS", "HZ", scpi.INVALID_SUFFIX),
        ("10 DBM", None, scpi.SUFFIX_NOT_ALLOWED),
        ("abc", "HZ", scpi.DATA_TYPE_ERROR),
        ("", None, scpi.DATA_TYPE_ERROR),
        ("1.2.3", None, scpi.DATA_TYPE_ERROR),
        ("ON", None, scpi.DATA_TYPE_ERROR),
        ("1e999", None, scpi.DATA_OUT_OF_RANGE),
    ],
)
def test_parse_number_rejects(token: str, unit: str | None, code: int) -> None:
    with pytest.raises(ScpiError) as caught:
        parse_number(token, unit)
    assert caught.value.code == code


def test_parse_number_unknown_unit_is_a_programming_error() -> None:
    with pytest.raises(ValueError):
        parse_number("1", "FURLONG")


@pytest.mark.parametrize(("token", "expected"), [("ON", True), ("on", True), ("1", True), ("OFF", False), (" off ", False), ("0", False)])
def test_parse_bool(token: str, expected: bool) -> None:
    assert parse_bool(token) is expected


@pytest.mark.parametrize("token", ["YES", "2", "", "TRUE"])
def test_parse_bool_rejects(token: str) -> None:
    with pytest.raises(ScpiError) as caught:
        parse_bool(token)
    assert caught.value.code == scpi.DATA_TYPE_ERROR


def test_unit_suffix_through_a_command(toy: ToyInstrument) -> None:
    toy.handle_line("FREQ 2.4 GHZ")
    assert toy.freq_hz == pytest.approx(2.4e9, rel=1e-12)
    toy.handle_line("FREQ 3 DBM")
    assert toy.freq_hz == pytest.approx(2.4e9, rel=1e-12)
    assert drain_errors(toy) == [scpi.INVALID_SUFFIX]


def test_parameter_count(toy: ToyInstrument) -> None:
    toy.handle_line("FREQ")
    toy.handle_line("OUTP ON,OFF")
    toy.handle_line("INIT:IMM 1")
    toy.handle_line("*IDN? 1")
    assert toy.sweep_count == 0
    assert drain_errors(toy) == [
        scpi.MISSING_PARAMETER,
        scpi.PARAMETER_NOT_ALLOWED,
        scpi.PARAMETER_NOT_ALLOWED,
        scpi.PARAMETER_NOT_ALLOWED,
    ]


# --- error queue: SCPI-1999 vol 2 21.8 (from memory): FIFO, '<code>,"<text>"', '0,"No error"' when
# empty, at most a fixed number of entries with the newest replaced by -350 on overflow.


def test_error_queue_is_fifo_with_standard_format(toy: ToyInstrument) -> None:
    toy.handle_line("BOGUS")
    toy.handle_line("FREQ 1e12")
    toy.handle_line("OUTP MAYBE")
    assert toy.handle_line("SYST:ERR:COUN?") == "3"
    first = toy.handle_line("SYST:ERR?")
    assert first.startswith('-113,"Undefined header')
    assert toy.handle_line("SYSTem:ERRor:NEXT?") == '-222,"Data out of range"'
    assert toy.handle_line("syst:err?").startswith('-104,"Data type error')
    assert toy.handle_line("SYST:ERR?") == '0,"No error"'
    assert toy.handle_line("SYST:ERR:COUN?") == "0"


def test_error_message_quotes_are_doubled(toy: ToyInstrument) -> None:
    toy.push_error(-200, 'Execution error;bad "x"')
    assert toy.handle_line("SYST:ERR?") == '-200,"Execution error;bad ""x"""'


def test_error_queue_overflow(toy: ToyInstrument) -> None:
    size = ScpiDevice.ERROR_QUEUE_SIZE
    assert size == 32  # the queue length this project fixed
    for _ in range(size + 8):
        toy.handle_line("BOGUS")
    codes = drain_errors(toy)
    assert len(codes) == size
    assert codes[:-1] == [scpi.UNDEFINED_HEADER] * (size - 1)
    assert codes[-1] == scpi.QUEUE_OVERFLOW
    # Room again after reading: new errors are queued normally.
    toy.handle_line("FREQ 1e12")
    assert drain_errors(toy) == [scpi.DATA_OUT_OF_RANGE]


def test_cls_clears_queue_and_event_register(toy: ToyInstrument) -> None:
    toy.handle_line("BOGUS;*OPC")  # the error drops *OPC
    toy.handle_line("FREQ 1e12")
    toy.handle_line("*CLS")
    assert toy.handle_line("SYST:ERR:COUN?") == "0"
    assert toy.handle_line("SYST:ERR?") == '0,"No error"'
    assert toy.handle_line("*ESR?") == "0"


# --- common commands, IEEE 488.2 ch. 10 (from memory).


def test_idn_and_lower_case_common_commands(toy: ToyInstrument) -> None:
    assert toy.handle_line("*IDN?") == "Toy Works,T1,0001,1.0"
    assert toy.handle_line("*idn?") == "Toy Works,T1,0001,1.0"
    assert toy.handle_line("*TST?") == "0"


def test_rst_calls_reset_and_keeps_the_error_queue(toy: ToyInstrument) -> None:
    toy.handle_line("FREQ 3e9;POW 5;:OUTP ON;:BOGUS")
    resets_before = toy.reset_count
    toy.handle_line("*RST")
    assert toy.reset_count == resets_before + 1
    assert (toy.freq_hz, toy.power_dbm, toy.rf_on) == (1e9, -20.0, False)
    # IEEE 488.2 10.32 (from memory): *RST does not touch the status data.
    assert drain_errors(toy) == [scpi.UNDEFINED_HEADER]


def test_opc_query_and_wai_settle(toy: ToyInstrument) -> None:
    assert toy.handle_line("*OPC?") == "1"
    toy.handle_line("*WAI")
    assert toy.settle_count == 2


def test_esr_bits_and_clear_on_read(toy: ToyInstrument) -> None:
    # IEEE 488.2 11.5.1.1 (from memory): bit 0 OPC, 2 query, 3 device, 4 execution, 5 command error.
    toy.handle_line("*OPC")
    assert toy.handle_line("*ESR?") == str(1)
    assert toy.handle_line("*ESR?") == "0"
    toy.handle_line("BOGUS")
    toy.handle_line("FREQ 1e12")
    assert toy.handle_line("*ESR?") == str(32 + 16)
    toy.push_error(-410, "Query INTERRUPTED")
    toy.push_error(-300, "Device-specific error")
    assert toy.handle_line("*ESR?") == str(4 + 8)


def test_unknown_common_command(toy: ToyInstrument) -> None:
    assert toy.handle_line("*XYZ?") is None
    toy.handle_line("*XYZ")
    assert drain_errors(toy) == [scpi.UNDEFINED_HEADER, scpi.UNDEFINED_HEADER]


def test_empty_line_does_nothing(toy: ToyInstrument) -> None:
    assert toy.handle_line("") is None
    assert toy.handle_line("   ") is None
    assert drain_errors(toy) == []


def test_scpi_error_default_message() -> None:
    assert ScpiError(scpi.DATA_OUT_OF_RANGE).message == "Data out of range"
    assert ScpiError(-222, "Data out of range;too high").message == "Data out of range;too high"


@pytest.mark.parametrize("pattern", ["freq", "FREQ[:CW", "FREQ]:CW", "FREQ:C-W", "*", "*ID1"])
def test_bad_patterns_are_programming_errors(pattern: str) -> None:
    device = ScpiDevice("x")
    with pytest.raises(ValueError):
        device.command(pattern, lambda p: None)
