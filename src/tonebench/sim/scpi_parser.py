"""Generic SCPI layer of the simulated bench: parameters, ';' chains, common commands, error queue.

A simulated instrument subclasses ScpiDevice and registers its setting commands and queries with
SCPI header patterns; handle_line() then takes one received line and returns the reply text.
The error codes (scpi_errors) and the header patterns (scpi_headers) live beside it; the codes are
re-exported here, so an instrument imports this module only.
Rules follow SCPI-1999 volume 1 (syntax) and volume 2 ch. 21 (error codes) and IEEE 488.2
(common commands, status bits), all cited from memory.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Callable

from tonebench.sim.scpi_errors import (  # noqa: F401  (the error codes are part of this module's face)
    COMMAND_ERROR, COMMAND_HEADER_ERROR, DATA_OUT_OF_RANGE, DATA_TYPE_ERROR, DEVICE_SPECIFIC_ERROR,
    ESR_COMMAND_ERROR, ESR_DEVICE_ERROR, ESR_EXECUTION_ERROR, ESR_OPERATION_COMPLETE, ESR_POWER_ON,
    ESR_QUERY_ERROR, EXECUTION_ERROR, HARDWARE_ERROR, HEADER_SUFFIX_OUT_OF_RANGE, ILLEGAL_PARAMETER_VALUE,
    INVALID_CHARACTER, INVALID_SEPARATOR, INVALID_STRING_DATA, INVALID_SUFFIX, MISSING_PARAMETER, NO_ERROR,
    NUMERIC_DATA_ERROR, PARAMETER_NOT_ALLOWED, QUERY_ERROR, QUERY_INTERRUPTED, QUERY_UNTERMINATED,
    QUEUE_OVERFLOW, SETTINGS_CONFLICT, STANDARD_MESSAGES, SUFFIX_NOT_ALLOWED, SYNTAX_ERROR, SYSTEM_ERROR,
    UNDEFINED_HEADER, ScpiError, esr_bit, scpi_error,
)
from tonebench.sim.scpi_headers import HeaderNode, compile_pattern, match_header, parse_received_node

# Suffix units and multipliers. SCPI-1999 vol 1 7.7.3 (from memory): the prefix M means milli,
# except in MHZ (and MOHM) where it means mega; MA is the general mega prefix, so MAHZ is also 1e6.
_UNIT_SUFFIXES: dict[str, dict[str, float]] = {
    "HZ": {"HZ": 1.0, "KHZ": 1e3, "MHZ": 1e6, "MAHZ": 1e6, "GHZ": 1e9},
    "DBM": {"DBM": 1.0},
    "DB": {"DB": 1.0},
    "S": {"S": 1.0, "MS": 1e-3, "US": 1e-6, "NS": 1e-9},
    "V": {"V": 1.0, "MV": 1e-3, "UV": 1e-6},
    "A": {"A": 1.0, "MA": 1e-3, "UA": 1e-6},
    "CEL": {"CEL": 1.0},  # degrees Celsius, SCPI's temperature unit
}

# Decimal numeric program data, IEEE 488.2 7.7.2 (from memory), then an optional suffix
# which may be separated by white space (7.7.3).
_NUMBER = re.compile(r"\s*([+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)\s*([A-Za-z]*)\s*$")


def parse_number(token: str, unit: str | None = None) -> float:
    """Parse a numeric parameter, returning it in the base unit `unit` (HZ, DBM, DB, S, V, A, CEL).

    With unit=None no suffix is allowed (-138). A suffix of another kind -> ScpiError(-131);
    not a number at all -> ScpiError(-104).
    """
    if unit is not None and unit.upper() not in _UNIT_SUFFIXES:
        raise ValueError(f"parse_number: unknown unit {unit!r}; allowed: {sorted(_UNIT_SUFFIXES)}")
    match = _NUMBER.match(token)
    if match is None:
        raise scpi_error(DATA_TYPE_ERROR, f"not a number: {token.strip()!r}")
    mantissa, suffix = match.group(1), match.group(2).upper()
    multiplier = 1.0
    if suffix:
        if unit is None:
            raise scpi_error(SUFFIX_NOT_ALLOWED, f"{suffix} on a plain number")
        allowed = _UNIT_SUFFIXES[unit.upper()]
        if suffix not in allowed:
            raise scpi_error(INVALID_SUFFIX, f"{suffix} where {unit.upper()} is expected")
        multiplier = allowed[suffix]
    value = float(mantissa) * multiplier
    if not math.isfinite(value):
        raise scpi_error(DATA_OUT_OF_RANGE, f"{token.strip()!r} is not finite")
    return value


def parse_bool(token: str) -> bool:
    """Parse a boolean parameter: ON/OFF/1/0 (any case), else ScpiError(-104)."""
    word = token.strip().upper()
    if word in ("ON", "1"):
        return True
    if word in ("OFF", "0"):
        return False
    raise scpi_error(DATA_TYPE_ERROR, f"not a boolean: {token.strip()!r}")


def _split_outside_quotes(text: str, separator: str) -> list[str]:
    """Split on `separator` outside "..." or '...' strings (a doubled quote stays inside, IEEE 488.2 7.7.5)."""
    parts: list[str] = []
    current: list[str] = []
    quote = ""
    for char in text:
        if quote:
            if char == quote:
                quote = ""
        elif char in "\"'":
            quote = char
        elif char == separator:
            parts.append("".join(current))
            current = []
            continue
        current.append(char)
    if quote:
        raise scpi_error(INVALID_STRING_DATA, "unterminated string")
    parts.append("".join(current))
    return parts


_COMMON_HEADER = re.compile(r"\*[A-Za-z]+")
# A program header, then white space, then the parameters (IEEE 488.2 7.4.3, from memory).
_UNIT = re.compile(r"(\S+)(?:\s+(.*))?", re.S)



@dataclass(frozen=True)
class _Entry:
    pattern: str
    nodes: tuple[HeaderNode, ...]
    handler: Callable
    nparams: int | None


class ScpiDevice:
    """Base for one simulated instrument: header matching, ';' chains, common commands, error queue.

    Not thread-safe by itself: the server calls handle_line() under the bench lock.
    """

    ERROR_QUEUE_SIZE = 32

    def __init__(self, idn: str):
        self.idn = idn
        self._commands: dict[str, _Entry] = {}
        self._queries: dict[str, _Entry] = {}
        self._errors: list[tuple[int, str]] = []
        self._esr = 0
        self.query("*IDN", lambda p: self.idn, nparams=0)
        self.command("*RST", lambda p: self.reset(), nparams=0)
        self.command("*CLS", lambda p: self._clear_status(), nparams=0)
        self.query("*OPC", lambda p: self._opc_query(), nparams=0)
        self.command("*OPC", lambda p: self._opc_command(), nparams=0)
        self.command("*WAI", lambda p: self.operation_complete(), nparams=0)
        self.query("*ESR", lambda p: self._read_esr(), nparams=0)
        self.query("*TST", lambda p: "0", nparams=0)
        self.query("SYSTem:ERRor[:NEXT]", lambda p: self._next_error(), nparams=0)
        self.query("SYSTem:ERRor:COUNt", lambda p: str(len(self._errors)), nparams=0)

    # --- registration -------------------------------------------------------------------------

    def command(self, pattern: str, handler: Callable[[list[str]], None], *, nparams: int | None = None) -> None:
        """Register a setting command. With `nparams` set, a different parameter count gives -109/-108."""
        self._commands[pattern] = self._entry(pattern, handler, nparams)

    def query(self, pattern: str, handler: Callable[[list[str]], str], *, nparams: int | None = None) -> None:
        """Register a query (pattern without '?'); the handler returns the reply text."""
        self._queries[pattern] = self._entry(pattern, handler, nparams)

    @staticmethod
    def _entry(pattern: str, handler: Callable, nparams: int | None) -> _Entry:
        if pattern.startswith("*"):
            if not _COMMON_HEADER.fullmatch(pattern):
                raise ValueError(f"SCPI pattern {pattern!r}: a common command is '*' and letters")
            return _Entry(pattern.upper(), (), handler, nparams)
        return _Entry(pattern, compile_pattern(pattern), handler, nparams)

    # --- hooks for subclasses -----------------------------------------------------------------

    def reset(self) -> None:
        """Called by *RST: put the instrument in its default state (the error queue stays, IEEE 488.2 10.32)."""

    def operation_complete(self) -> None:
        """Called by *OPC?, *OPC and *WAI: settle every pending operation."""

    def power_cycle(self) -> None:
        """Switched off and on again: default state, empty error queue, power-on bit set.

        IEEE 488.2 11.5.1.1 (from memory): bit 7 (PON) of the event status register reports that
        power was turned off and on since the register was last read.
        """
        self.reset()
        self._errors.clear()
        self._esr = ESR_POWER_ON

    # --- error queue --------------------------------------------------------------------------

    def push_error(self, code: int, message: str) -> None:
        """Append to the error queue (FIFO, at most ERROR_QUEUE_SIZE entries)."""
        # SCPI-1999 vol 2 21.8 (from memory): when full, the newest entry becomes -350 and
        # later errors are lost until the queue is read.
        if len(self._errors) >= self.ERROR_QUEUE_SIZE:
            self._errors[-1] = (QUEUE_OVERFLOW, STANDARD_MESSAGES[QUEUE_OVERFLOW])
        else:
            self._errors.append((code, message))
        self._esr |= esr_bit(code)

    def _next_error(self) -> str:
        code, message = self._errors.pop(0) if self._errors else (NO_ERROR, STANDARD_MESSAGES[NO_ERROR])
        # String response data doubles embedded quotes (IEEE 488.2 8.7.8, from memory).
        return f'{code},"{message.replace(chr(34), chr(34) * 2)}"'

    def _clear_status(self) -> None:
        self._errors.clear()
        self._esr = 0

    def _opc_query(self) -> str:
        self.operation_complete()
        return "1"

    def _opc_command(self) -> None:
        self.operation_complete()
        self._esr |= ESR_OPERATION_COMPLETE

    def _read_esr(self) -> str:
        # Reading the event register clears it (IEEE 488.2 11.5.1.2, from memory).
        value, self._esr = self._esr, 0
        return str(value)

    # --- parsing ------------------------------------------------------------------------------

    def handle_line(self, line: str) -> str | None:
        """Execute one received line (terminator stripped); return the joined query replies or None."""
        replies: list[str] = []
        # Each new program message starts at the root (SCPI-1999 vol 1 6.2.4, from memory).
        path: tuple[str, ...] = ()
        try:
            for unit in _split_outside_quotes(line, ";"):
                if not unit.strip():
                    continue
                reply, path = self._run_unit(unit.strip(), path)
                if reply is not None:
                    replies.append(reply)
        except ScpiError as err:
            # A failed unit drops the rest of the message; replies already made are still sent.
            self.push_error(err.code, err.message)
        return ";".join(replies) if replies else None

    def _run_unit(self, unit: str, path: tuple[str, ...]) -> tuple[str | None, tuple[str, ...]]:
        """Run one message unit; return its reply and the path for the next unit."""
        header, rest = _UNIT.fullmatch(unit).group(1, 2)
        rest = rest or ""
        params = [p.strip() for p in _split_outside_quotes(rest, ",")] if rest.strip() else []
        is_query = header.endswith("?")
        name = header[:-1] if is_query else header
        if "?" in name or not name:
            raise scpi_error(SYNTAX_ERROR, f"bad header {header!r}")
        table = self._queries if is_query else self._commands
        if name.startswith("*"):
            # Common commands do not change the current path (SCPI-1999 vol 1 6.2.4, from memory).
            entry = table.get(name.upper())
            if entry is None:
                raise scpi_error(UNDEFINED_HEADER, header)
            return self._call(entry, params, is_query), path
        # A leading ':' starts at the root; otherwise continue at the previous path.
        nodes_text = name[1:].split(":") if name.startswith(":") else list(path) + name.split(":")
        if any(not n for n in nodes_text):
            raise scpi_error(SYNTAX_ERROR, f"empty node in {header!r}")
        received = tuple(parse_received_node(n) for n in nodes_text)
        best_state = 0
        for entry in table.values():
            if not entry.nodes:
                continue
            state = match_header(entry.nodes, received)
            if state == 2:
                return self._call(entry, params, is_query), tuple(nodes_text[:-1])
            best_state = max(best_state, state)
        if best_state == 1:
            raise scpi_error(HEADER_SUFFIX_OUT_OF_RANGE, header)
        raise scpi_error(UNDEFINED_HEADER, ":".join(nodes_text) + ("?" if is_query else ""))

    @staticmethod
    def _call(entry: _Entry, params: list[str], is_query: bool) -> str | None:
        if entry.nparams is not None:
            if len(params) < entry.nparams:
                raise scpi_error(MISSING_PARAMETER, f"{entry.pattern} takes {entry.nparams}")
            if len(params) > entry.nparams:
                raise scpi_error(PARAMETER_NOT_ALLOWED, f"{entry.pattern} takes {entry.nparams}")
        reply = entry.handler(params)
        return reply if is_query else None
