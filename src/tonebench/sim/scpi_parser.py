"""Generic SCPI layer of the simulated bench: header matching, ';' chains, common commands, error queue.

A simulated instrument subclasses ScpiDevice and registers its setting commands and queries with
SCPI header patterns; handle_line() then takes one received line and returns the reply text.
Rules follow SCPI-1999 volume 1 (syntax) and volume 2 ch. 21 (error codes) and IEEE 488.2
(common commands, status bits), all cited from memory.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Callable

# Error codes, SCPI-1999 vol 2 ch. 21 (from memory).
NO_ERROR = 0
COMMAND_ERROR = -100
INVALID_CHARACTER = -101
SYNTAX_ERROR = -102
INVALID_SEPARATOR = -103
DATA_TYPE_ERROR = -104
PARAMETER_NOT_ALLOWED = -108
MISSING_PARAMETER = -109
COMMAND_HEADER_ERROR = -110
UNDEFINED_HEADER = -113
HEADER_SUFFIX_OUT_OF_RANGE = -114
NUMERIC_DATA_ERROR = -120
INVALID_SUFFIX = -131
SUFFIX_NOT_ALLOWED = -138
INVALID_STRING_DATA = -151
EXECUTION_ERROR = -200
SETTINGS_CONFLICT = -221
DATA_OUT_OF_RANGE = -222
ILLEGAL_PARAMETER_VALUE = -224
HARDWARE_ERROR = -240
DEVICE_SPECIFIC_ERROR = -300
SYSTEM_ERROR = -310
QUEUE_OVERFLOW = -350
QUERY_ERROR = -400
QUERY_INTERRUPTED = -410
QUERY_UNTERMINATED = -420

STANDARD_MESSAGES: dict[int, str] = {
    NO_ERROR: "No error",
    COMMAND_ERROR: "Command error",
    INVALID_CHARACTER: "Invalid character",
    SYNTAX_ERROR: "Syntax error",
    INVALID_SEPARATOR: "Invalid separator",
    DATA_TYPE_ERROR: "Data type error",
    PARAMETER_NOT_ALLOWED: "Parameter not allowed",
    MISSING_PARAMETER: "Missing parameter",
    COMMAND_HEADER_ERROR: "Command header error",
    UNDEFINED_HEADER: "Undefined header",
    HEADER_SUFFIX_OUT_OF_RANGE: "Header suffix out of range",
    NUMERIC_DATA_ERROR: "Numeric data error",
    INVALID_SUFFIX: "Invalid suffix",
    SUFFIX_NOT_ALLOWED: "Suffix not allowed",
    INVALID_STRING_DATA: "Invalid string data",
    EXECUTION_ERROR: "Execution error",
    SETTINGS_CONFLICT: "Settings conflict",
    DATA_OUT_OF_RANGE: "Data out of range",
    ILLEGAL_PARAMETER_VALUE: "Illegal parameter value",
    HARDWARE_ERROR: "Hardware error",
    DEVICE_SPECIFIC_ERROR: "Device-specific error",
    SYSTEM_ERROR: "System error",
    QUEUE_OVERFLOW: "Queue overflow",
    QUERY_ERROR: "Query error",
    QUERY_INTERRUPTED: "Query INTERRUPTED",
    QUERY_UNTERMINATED: "Query UNTERMINATED",
}

# Standard Event Status Register bits, IEEE 488.2 11.5.1.1 (from memory).
ESR_OPERATION_COMPLETE = 1 << 0
ESR_QUERY_ERROR = 1 << 2
ESR_DEVICE_ERROR = 1 << 3
ESR_EXECUTION_ERROR = 1 << 4
ESR_COMMAND_ERROR = 1 << 5
ESR_POWER_ON = 1 << 7


class ScpiError(Exception):
    """An SCPI error: `code` as in SCPI-1999 vol 2 ch. 21, `message` the text put in the error queue."""

    def __init__(self, code: int, message: str = ""):
        self.code = code
        self.message = message or STANDARD_MESSAGES.get(code, "Error")
        super().__init__(f"{code},{self.message}")


def _error(code: int, detail: str) -> ScpiError:
    # SCPI-1999 vol 2 21.8 (from memory): device info follows the standard text after ';'.
    return ScpiError(code, f"{STANDARD_MESSAGES[code]};{detail}")


# Suffix units and multipliers. SCPI-1999 vol 1 7.7.3 (from memory): the prefix M means milli,
# except in MHZ (and MOHM) where it means mega; MA is the general mega prefix, so MAHZ is also 1e6.
_UNIT_SUFFIXES: dict[str, dict[str, float]] = {
    "HZ": {"HZ": 1.0, "KHZ": 1e3, "MHZ": 1e6, "MAHZ": 1e6, "GHZ": 1e9},
    "DBM": {"DBM": 1.0},
    "DB": {"DB": 1.0},
    "S": {"S": 1.0, "MS": 1e-3, "US": 1e-6, "NS": 1e-9},
    "V": {"V": 1.0, "MV": 1e-3, "UV": 1e-6},
    "A": {"A": 1.0, "MA": 1e-3, "UA": 1e-6},
}

# Decimal numeric program data, IEEE 488.2 7.7.2 (from memory), then an optional suffix
# which may be separated by white space (7.7.3).
_NUMBER = re.compile(r"\s*([+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)\s*([A-Za-z]*)\s*$")


def parse_number(token: str, unit: str | None = None) -> float:
    """Parse a numeric parameter, returning it in the base unit `unit` (HZ, DBM, DB, S, V, A).

    With unit=None no suffix is allowed (-138). A suffix of another kind -> ScpiError(-131);
    not a number at all -> ScpiError(-104).
    """
    if unit is not None and unit.upper() not in _UNIT_SUFFIXES:
        raise ValueError(f"parse_number: unknown unit {unit!r}; allowed: {sorted(_UNIT_SUFFIXES)}")
    match = _NUMBER.match(token)
    if match is None:
        raise _error(DATA_TYPE_ERROR, f"not a number: {token.strip()!r}")
    mantissa, suffix = match.group(1), match.group(2).upper()
    multiplier = 1.0
    if suffix:
        if unit is None:
            raise _error(SUFFIX_NOT_ALLOWED, f"{suffix} on a plain number")
        allowed = _UNIT_SUFFIXES[unit.upper()]
        if suffix not in allowed:
            raise _error(INVALID_SUFFIX, f"{suffix} where {unit.upper()} is expected")
        multiplier = allowed[suffix]
    value = float(mantissa) * multiplier
    if not math.isfinite(value):
        raise _error(DATA_OUT_OF_RANGE, f"{token.strip()!r} is not finite")
    return value


def parse_bool(token: str) -> bool:
    """Parse a boolean parameter: ON/OFF/1/0 (any case), else ScpiError(-104)."""
    word = token.strip().upper()
    if word in ("ON", "1"):
        return True
    if word in ("OFF", "0"):
        return False
    raise _error(DATA_TYPE_ERROR, f"not a boolean: {token.strip()!r}")


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
        raise _error(INVALID_STRING_DATA, "unterminated string")
    parts.append("".join(current))
    return parts


@dataclass(frozen=True)
class _Node:
    """One node of a registered header pattern."""

    short: str
    long: str
    optional: bool
    takes_suffix: bool

    def suffix_state(self, suffix: int | None) -> int:
        """2: accepted, 1: node matches but suffix out of range, 0: node does not take a suffix."""
        if suffix is None:
            return 2
        if not self.takes_suffix:
            return 0
        return 2 if suffix == 1 else 1


_PATTERN_TOKEN = re.compile(r"\[|\]|:|([A-Za-z]+)(#?)")
_RECEIVED_NODE = re.compile(r"([A-Za-z][A-Za-z_]*?)(\d*)")
_COMMON_HEADER = re.compile(r"\*[A-Za-z]+")
# A program header, then white space, then the parameters (IEEE 488.2 7.4.3, from memory).
_UNIT = re.compile(r"(\S+)(?:\s+(.*))?", re.S)


def _compile_pattern(pattern: str) -> tuple[_Node, ...]:
    """Turn "[SENSe]:FREQuency:CENTer" style notation into nodes; bad patterns are programming errors."""
    nodes: list[_Node] = []
    depth = 0
    pos = 0
    while pos < len(pattern):
        match = _PATTERN_TOKEN.match(pattern, pos)
        if match is None:
            raise ValueError(f"SCPI pattern {pattern!r}: unexpected {pattern[pos]!r} at {pos}")
        token = match.group(0)
        if token == "[":
            depth += 1
        elif token == "]":
            depth -= 1
            if depth < 0:
                raise ValueError(f"SCPI pattern {pattern!r}: unbalanced ']'")
        elif token != ":":
            word = match.group(1)
            short = "".join(c for c in word if c.isupper())
            if not short or not word.upper().startswith(short):
                raise ValueError(f"SCPI pattern {pattern!r}: node {word!r} needs a leading uppercase short form")
            nodes.append(_Node(short, word.upper(), depth > 0, match.group(2) == "#"))
        pos = match.end()
    if depth != 0 or not nodes:
        raise ValueError(f"SCPI pattern {pattern!r}: unbalanced '[' or no node")
    return tuple(nodes)


def _match(pattern: tuple[_Node, ...], received: tuple[tuple[str, int | None], ...]) -> int:
    """2: match, 1: match except a numeric suffix out of range, 0: no match."""
    if not pattern:
        return 2 if not received else 0
    node, rest = pattern[0], pattern[1:]
    best = _match(rest, received) if node.optional else 0
    if best < 2 and received:
        word, suffix = received[0]
        # SCPI-1999 vol 1 6.2.1 (from memory): only the exact short or long form is accepted.
        if word in (node.short, node.long):
            state = node.suffix_state(suffix)
            if state:
                best = max(best, min(state, _match(rest, received[1:])))
    return best


def _parse_received_node(text: str) -> tuple[str, int | None]:
    match = _RECEIVED_NODE.fullmatch(text)
    if match is None:
        raise _error(SYNTAX_ERROR, f"bad header node {text!r}")
    digits = match.group(2)
    return match.group(1).upper(), (int(digits) if digits else None)


@dataclass(frozen=True)
class _Entry:
    pattern: str
    nodes: tuple[_Node, ...]
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
        return _Entry(pattern, _compile_pattern(pattern), handler, nparams)

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
        self._esr |= _esr_bit(code)

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
            raise _error(SYNTAX_ERROR, f"bad header {header!r}")
        table = self._queries if is_query else self._commands
        if name.startswith("*"):
            # Common commands do not change the current path (SCPI-1999 vol 1 6.2.4, from memory).
            entry = table.get(name.upper())
            if entry is None:
                raise _error(UNDEFINED_HEADER, header)
            return self._call(entry, params, is_query), path
        # A leading ':' starts at the root; otherwise continue at the previous path.
        nodes_text = name[1:].split(":") if name.startswith(":") else list(path) + name.split(":")
        if any(not n for n in nodes_text):
            raise _error(SYNTAX_ERROR, f"empty node in {header!r}")
        received = tuple(_parse_received_node(n) for n in nodes_text)
        best_state = 0
        for entry in table.values():
            if not entry.nodes:
                continue
            state = _match(entry.nodes, received)
            if state == 2:
                return self._call(entry, params, is_query), tuple(nodes_text[:-1])
            best_state = max(best_state, state)
        if best_state == 1:
            raise _error(HEADER_SUFFIX_OUT_OF_RANGE, header)
        raise _error(UNDEFINED_HEADER, ":".join(nodes_text) + ("?" if is_query else ""))

    @staticmethod
    def _call(entry: _Entry, params: list[str], is_query: bool) -> str | None:
        if entry.nparams is not None:
            if len(params) < entry.nparams:
                raise _error(MISSING_PARAMETER, f"{entry.pattern} takes {entry.nparams}")
            if len(params) > entry.nparams:
                raise _error(PARAMETER_NOT_ALLOWED, f"{entry.pattern} takes {entry.nparams}")
        reply = entry.handler(params)
        return reply if is_query else None


def _esr_bit(code: int) -> int:
    """Event status bit for an error code class (IEEE 488.2 11.5.1.1 and SCPI-1999 vol 2 21.8, from memory)."""
    if -199 <= code <= -100:
        return ESR_COMMAND_ERROR
    if -299 <= code <= -200:
        return ESR_EXECUTION_ERROR
    if -499 <= code <= -400:
        return ESR_QUERY_ERROR
    if code != NO_ERROR:
        return ESR_DEVICE_ERROR
    return 0
