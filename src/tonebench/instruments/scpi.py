"""A generic SCPI instrument: role operations in, the dialect's strings out, parsed replies back."""

from __future__ import annotations

import math
from typing import NamedTuple

import pyvisa

from tonebench.errors import InstrumentError, TonebenchError
from tonebench.instruments.dialect import Dialect

# Bounded so an instrument that never reports "no error" cannot hang the drain.
MAX_ERROR_READS = 50

# SCPI-99 vol. 1, 7.2.1.5 (from memory): 9.91E37 is the value an instrument returns for
# "not a number", e.g. a marker with nothing to read.
SCPI_NAN = 9.91e37


class LimitError(TonebenchError):
    """A setting outside the limits its dialect file declares for the instrument."""


class ScpiError(NamedTuple):
    """One entry of an instrument's error queue (code 0 means the queue is empty)."""

    code: int
    message: str


_EXPECTED = {
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
            raise ValueError("not a number")
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


class ScpiInstrument:
    """An open VISA resource driven through a dialect; `label` ("source1") names it in errors."""

    def __init__(self, resource, dialect: Dialect, label: str):
        self.resource = resource
        self.dialect = dialect
        self.label = label
        self._idn: str | None = None

    def has(self, operation: str) -> bool:
        return operation in self.dialect.operations

    def call(self, operation: str, **fields):
        """Send one operation; for a query return its parsed reply."""
        op = self.dialect.operations.get(operation)
        if op is None:
            raise InstrumentError(
                f"{self.label}: dialect {self.dialect.name} has no operation '{operation}'"
            )
        message = op.template.format(**fields)
        where = f"{self.label}: {operation} ({message!r})"
        try:
            if not op.is_query:
                self.resource.write(message)
                return None
            reply = self.resource.query(message)
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                timeout_s = self.resource.timeout / 1000
                raise InstrumentError(
                    f"{self.label}: no reply to {operation} ({message!r}) within {timeout_s:g} s"
                ) from None
            raise InstrumentError(f"{where} failed: {exc}") from None
        except OSError as exc:  # connection dropped or refused (pyvisa-py sockets)
            raise InstrumentError(f"{where} failed: {exc}") from None
        try:
            return parse_reply(op.reply, reply)
        except ValueError:
            raise InstrumentError(
                f"{where} replied {reply!r}; expected {_EXPECTED[op.reply]}"
            ) from None

    def check_errors(self) -> None:
        """Drain the error queue; raise InstrumentError listing every entry if there were any."""
        entries: list[ScpiError] = []
        for _ in range(MAX_ERROR_READS):
            entry = self.call("next_error")
            if entry.code == 0:
                break
            entries.append(entry)
        else:
            entries.append(ScpiError(0, f"error queue not empty after {MAX_ERROR_READS} reads"))
        if entries:
            listed = "; ".join(f"{e.code}, {e.message}" for e in entries)
            raise InstrumentError(f"{self.label}: {listed}")

    def configure(self, steps: list[tuple[str, dict]]) -> None:
        """Run (operation, fields) steps in order, then drain the error queue."""
        for operation, fields in steps:
            self.call(operation, **fields)
        self.check_errors()

    def wait_complete(self, timeout_s: float) -> None:
        """Block on *OPC? (the wait_complete operation) for up to `timeout_s` seconds."""
        previous_ms = self.resource.timeout
        self.resource.timeout = max(1, round(timeout_s * 1000))
        try:
            done = self.call("wait_complete")
        finally:
            self.resource.timeout = previous_ms
        if done != 1:
            raise InstrumentError(f"{self.label}: wait_complete replied {done}; expected 1")

    @property
    def idn(self) -> str:
        """The identify reply, queried once."""
        if self._idn is None:
            self._idn = self.call("identify")
        return self._idn

    def close(self) -> None:
        try:
            self.resource.close()
        except (pyvisa.errors.Error, OSError):
            pass  # closing an already dropped connection is not worth reporting


class RoleDriver:
    """What every role driver (source, analyzer, ...) has: its instrument, label and *IDN?."""

    def __init__(self, instrument: ScpiInstrument):
        self.instrument = instrument

    @property
    def label(self) -> str:
        return self.instrument.label

    @property
    def idn(self) -> str:
        return self.instrument.idn
