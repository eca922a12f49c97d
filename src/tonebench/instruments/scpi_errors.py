"""What an instrument's replies and error queue can say, shared by the SCPI instrument and its
supervision (neither imports the other's module for these): reply parsing (a joined line's
fields, the identity in *IDN?), the SCPI codes, the operations an error text names, and the
exceptions of a refused, failed or out-of-step exchange."""

from __future__ import annotations

import math
from typing import NamedTuple

from tonebench.errors import InstrumentError, LimitError, TonebenchError  # noqa: F401 - LimitError named here too

# SCPI-99 vol. 1, 7.2.1.5 (from memory): 9.91E37 is the value an instrument returns for
# "not a number", e.g. a marker with nothing to read.
SCPI_NAN = 9.91e37


# SCPI-1999 vol 2 ch. 21 (from memory): -100..-199 are command errors (the instrument could not
# parse the header or its parameters): the dialect's string does not fit this instrument, and
# sending it again cannot help.
COMMAND_ERROR_CODES = range(-199, -99)


class NotANumber(ValueError):
    """A float reply that is the instrument's "not a number" (9.91E37), NaN or infinite."""


class ScpiError(NamedTuple):
    """One entry of an instrument's error queue (code 0 means the queue is empty)."""

    code: int
    message: str


EXPECTED_REPLIES = {
    "text": "a line of text",
    "float": "a number",
    "int": "an integer",
    "bool": "1, 0, ON or OFF",
    "error": 'an error entry like 0,"No error"',
}


def parse_reply(kind: str, text: str):
    """Parse one reply line by its kind; raise ValueError if it does not fit."""
    text = text.strip()
    if kind == "text":
        return text
    if kind == "float":
        value = float(text)
        if not math.isfinite(value) or value == SCPI_NAN:
            raise NotANumber("not a number")
        return value
    if kind == "int":
        try:
            return int(text)
        except ValueError:
            value = float(text)  # some instruments answer an integer as +8.00000E+00
            if not value.is_integer():
                raise
            return int(value)
    if kind == "bool":
        word = text.upper()
        if word in ("1", "ON"):
            return True
        if word in ("0", "OFF"):
            return False
        raise ValueError("not a boolean")
    if kind == "error":
        code_text, sep, message = text.partition(",")
        if not sep:
            raise ValueError("no comma")
        return ScpiError(int(code_text), message.strip().strip('"'))
    raise ValueError(f"unknown reply kind {kind!r}")


class ConnectionFault(InstrumentError):
    """No reply in time, a dropped connection, or a reply showing the replies are out of step.

    `timed_out` tells whether the connection may still be usable (after a resynchronisation)
    or is gone (it must be reopened).
    """

    def __init__(self, message: str, *, timed_out: bool, operation: str | None = None, sent: str | None = None):
        super().__init__(message)
        self.timed_out = timed_out
        # Set when a query got no reply at all: worth asking the error queue why (supervision).
        self.operation = operation
        self.sent = sent


class ImpossibleReading(InstrumentError):
    """A reply no instrument can give as a reading: not a number (SCPI 9.91E37, NaN, inf), or a
    level outside what is physically possible (analyzer.judge_marker_dbm). Not a connection fault:
    the point fails at once and is stored as failed with this reason (recovery.PointGuard)."""


class CommandRefused(InstrumentError):
    """The instrument refused a dialect operation with a command error (-100..-199, e.g. -113
    undefined header): the dialect does not fit the instrument. Never retried; the run stops."""

    def __init__(self, message: str, entries: list[ScpiError]):
        super().__init__(message)
        self.entries = entries


class ScpiErrors(InstrumentError):
    """The instrument's error queue held entries (`entries`) after an operation."""

    def __init__(self, message: str, entries: list[ScpiError]):
        super().__init__(message)
        self.entries = entries


class IdentityChanged(InstrumentError):
    """After reopening a connection, a different instrument (maker, model or serial) answered."""


# Named when no error text points at one operation: the last few sent.
MAX_NAMED_OPERATIONS = 3


def refused_operations(sent: list[tuple[str, str]], entries: list[ScpiError]) -> str:
    """The operations a refusal is about: those whose header the error text quotes (instruments
    commonly append it, e.g. -113,"Undefined header;BANDX"), else the last few sent."""
    texts = " ".join(e.message.upper() for e in entries)
    quoted = [(op, text) for op, text in sent if text.split(" ")[0].upper() in texts]
    named = quoted or sent[-MAX_NAMED_OPERATIONS:]
    return ", ".join(f"{op} ({text!r})" for op, text in named) or "an operation"


def split_replies(reply: str) -> list[str] | None:
    """A joined reply's fields, split at each ';' outside double quotes (an error entry's text may
    hold a ';'; a doubled quote inside a string toggles twice, so it stays inside). None when a
    quote is left open: the line is not a well-formed reply."""
    parts, start, quoted = [], 0, False
    for index, char in enumerate(reply):
        if char == '"':
            quoted = not quoted
        elif char == ";" and not quoted:
            parts.append(reply[start:index])
            start = index + 1
    parts.append(reply[start:])
    return None if quoted else parts


def identity(idn: str) -> tuple[str, ...]:
    """Maker, model and serial from an identify reply (IEEE 488.2 *IDN? fields; firmware left out)."""
    return tuple(part.strip().lower() for part in idn.split(",")[:3])
