"""SCPI commands of the simulated analyzer's detector and trace averaging (sim/detector.py models them).

[SENSe]:DETector[:FUNCtion] RMS|SAMPle|POSitive, [SENSe]:AVERage:TYPE POWer|LOG,
[SENSe]:AVERage:COUNt <n>, [SENSe]:AVERage[:STATe] ON|OFF, each with its query. Character data
is matched in its short or long form, as SCPI-1999 vol 1 7.3 has it (from memory).
"""

from __future__ import annotations

from tonebench.sim.detector import MAX_AVERAGE_COUNT
from tonebench.sim.scpi_parser import (
    DATA_OUT_OF_RANGE,
    ILLEGAL_PARAMETER_VALUE,
    ScpiError,
    parse_bool,
    parse_number,
)

# Short form, long form -> the model's name.
_DETECTOR_WORDS = {("RMS", "RMS"): "rms", ("SAMP", "SAMPLE"): "sample", ("POS", "POSITIVE"): "peak"}
_AVERAGE_WORDS = {("POW", "POWER"): "power", ("LOG", "LOG"): "log"}


def _word(params: list[str], words: dict[tuple[str, str], str], what: str) -> str:
    token = params[0].strip().upper()
    for forms, name in words.items():
        if token in forms:
            return name
    allowed = ", ".join(long for _, long in words)
    raise ScpiError(ILLEGAL_PARAMETER_VALUE, f"Illegal parameter value;{what} {token!r}; allowed: {allowed}")


def _short(words: dict[tuple[str, str], str], name: str) -> str:
    return next(short for (short, _), value in words.items() if value == name)


def _count(params: list[str]) -> int:
    value = parse_number(params[0])
    if value != int(value) or not 1 <= value <= MAX_AVERAGE_COUNT:
        raise ScpiError(DATA_OUT_OF_RANGE, f"Data out of range;average count {value:g}: a whole number 1 to {MAX_AVERAGE_COUNT}")
    return int(value)


def add_detector_commands(device) -> None:
    """Register the commands on a SimAnalyzer (its bench's analyzer state is looked up per call:
    *RST replaces it, back to rms, power averaging, averaging off, count 1)."""
    state = lambda: device.bench.analyzer.detector
    device._setting(("[SENSe]:DETector[:FUNCtion]",),
                    lambda p: setattr(state(), "detector", _word(p, _DETECTOR_WORDS, "detector")),
                    lambda: _short(_DETECTOR_WORDS, state().detector))
    device._setting(("[SENSe]:AVERage:TYPE",),
                    lambda p: setattr(state(), "average_type", _word(p, _AVERAGE_WORDS, "average type")),
                    lambda: _short(_AVERAGE_WORDS, state().average_type))
    device._setting(("[SENSe]:AVERage:COUNt",), lambda p: setattr(state(), "average_count", _count(p)),
                    lambda: str(state().average_count))
    device._setting(("[SENSe]:AVERage[:STATe]",), lambda p: setattr(state(), "averaging", parse_bool(p[0])),
                    lambda: "1" if state().averaging else "0")
