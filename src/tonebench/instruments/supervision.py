"""Keeping instrument connections usable through faults: bounded retries with backoff, then reopen.

After a timeout the connection may still carry the late reply of the query that timed out, so a
retry on the same connection first resynchronises (ScpiInstrument.resync: *IDN? is asked and reply
lines are discarded until the identity comes back). When that fails, or the connection dropped,
the resource is closed and opened again with the dialect's terminations and timeout and
TCP_NODELAY, the identity is checked (same maker, model and serial, else IdentityChanged, never
retried), and the role drivers re-apply what they last set (their restore hooks).

This layer knows nothing of the store or the run: it reports what it did as InstrumentEvent
through a callback, and a stop request (threading.Event) ends any recovery at once.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Protocol, TypeVar

from tonebench.errors import InstrumentError
from tonebench.instruments.dialect import Dialect
from tonebench.instruments.scpi_errors import (
    COMMAND_ERROR_CODES,
    CommandRefused,
    ConnectionFault,
    ScpiError,
    ScpiErrors,
)
from tonebench.instruments.transport import Unreachable

_log = logging.getLogger(__name__)

T = TypeVar("T")

EVENT_KINDS = ("retry", "reconnect", "reapplied", "scpi-error", "gave-up", "state-lost", "impossible-reading")


@dataclass(frozen=True)
class RetryPolicy:
    """How hard to try before an operation fails. Times in seconds."""

    retries: int = 2  # resynchronise-and-retry attempts on the same connection after a timeout
    reconnects: int = 3  # close-and-reopen attempts after those, or at once after a drop
    backoff_s: float = 0.1  # wait before the first attempt, doubled for each further one
    max_backoff_s: float = 5.0

    def wait_s(self, attempt: int) -> float:
        """Wait before recovery attempt number `attempt` (0-based)."""
        return min(self.max_backoff_s, self.backoff_s * 2.0**attempt)


@dataclass(frozen=True)
class InstrumentEvent:
    """Something the supervision did or saw; kind is one of EVENT_KINDS, level info/warning/error."""

    instrument: str
    kind: str
    level: str
    message: str
    details: dict = field(default_factory=dict)


EventCallback = Callable[[InstrumentEvent], None]


class RecoveryStopped(InstrumentError):
    """Recovery was not attempted or was cut short because a stop was requested."""


class GaveUp(InstrumentError):
    """Every retry and reconnect the policy allows failed."""


class Recoverable(Protocol):
    """What supervision needs of an instrument (tonebench.instruments.scpi.ScpiInstrument has it);
    named here so that this module does not import the instrument that imports it."""

    label: str
    dialect: Dialect
    epoch: int

    def resync(self) -> list[str] | None: ...

    def reopen(self) -> str: ...

    def errors_after_no_reply(self) -> list[ScpiError] | None: ...

    def refused_operations(self, entries: list[ScpiError]) -> str: ...


class Supervision:
    """Shared by the instruments of one bench: the retry policy, the event callback, a stop flag.
    on_activity is called after every exchange an instrument answered: progress, for a watchdog."""

    def __init__(self, policy: RetryPolicy | None = None, on_event: EventCallback | None = None,
                 on_activity: Callable[[], None] | None = None):
        self.policy = policy or RetryPolicy()
        self.on_event = on_event
        self.on_activity = on_activity
        # Set by the watchdog or a shutdown: no further retries, backoff waits end at once.
        self.stop = threading.Event()

    def activity(self) -> None:
        if self.on_activity is not None:
            self.on_activity()

    def emit(self, instrument: str, kind: str, level: str, message: str, details: dict | None = None) -> None:
        if self.on_event is None:
            return
        try:
            self.on_event(InstrumentEvent(instrument, kind, level, message, details or {}))
        except Exception:  # noqa: BLE001 - losing an event line must not break the measurement
            _log.exception("event callback failed for %s", message)

    def run(self, instrument: Recoverable, attempt: Callable[[], T]) -> T:
        """Return attempt(); after a ConnectionFault recover per the policy and try again."""
        policy, label = self.policy, instrument.label
        retries = reconnects = waits = 0
        while True:
            try:
                return attempt()
            except ConnectionFault as fault:
                last: InstrumentError = fault
                timed_out = fault.timed_out
                if fault.operation not in (None, "next_error") and retries == reconnects == 0:
                    self._ask_why_no_reply(instrument, fault)
            while True:  # recover until the connection is usable again
                if self.stop.is_set():
                    raise RecoveryStopped(f"{last}; not retried: the run is stopping") from None
                if timed_out and retries < policy.retries:
                    retries += 1
                    self._backoff(waits, label)
                    waits += 1
                    discarded = instrument.resync()
                    outcome = "back in step" if discarded is not None else "no identity came back"
                    self.emit(label, "retry", "warning",
                              f"{last}; retry {retries} of {policy.retries} on the same connection ({outcome})",
                              {"discarded": discarded or []})
                    if discarded is not None:
                        break
                    # Its identify query may still be answered late: only a fresh connection is
                    # certain to be in step now.
                    timed_out = False
                    continue
                if reconnects < policy.reconnects:
                    reconnects += 1
                    self._backoff(waits, label)
                    waits += 1
                    try:
                        idn = instrument.reopen()
                    except (Unreachable, ConnectionFault) as exc:
                        self.emit(label, "reconnect", "warning",
                                  f"{label}: reopening failed ({reconnects} of {policy.reconnects}): {exc}")
                        continue
                    self.emit(label, "reconnect", "warning",
                              f"{label}: connection reopened ({reconnects} of {policy.reconnects}) after: {last}",
                              {"epoch": instrument.epoch})
                    self.emit(label, "reapplied", "info",
                              f"{label}: same instrument ({idn}); its last settings were sent again",
                              {"idn": idn, "epoch": instrument.epoch})
                    break
                message = f"{last}; gave up after {retries} retries and {reconnects} reconnects"
                self.emit(label, "gave-up", "error", message)
                raise GaveUp(message) from None

    def _ask_why_no_reply(self, instrument: Recoverable, fault: ConnectionFault) -> None:
        """Before the first retry of a query that got no reply, read the error queue on the same
        connection: an instrument that rejected the query says so there and sends nothing, and
        retrying or reconnecting would only repeat that for minutes with RF on.

        A command error (-100..-199, e.g. -113 undefined header) raises CommandRefused naming the
        role, the dialect operation and the instrument's text; any other entry raises ScpiErrors
        (the point is measured again by the caller, the connection is in step); an empty or
        silent queue leaves the usual recovery to go on.
        """
        entries = instrument.errors_after_no_reply()
        if not entries:
            return
        label = instrument.label
        listed = "; ".join(f"{e.code}, {e.message}" for e in entries)
        details = {"entries": [list(e) for e in entries], "operation": fault.operation, "sent": fault.sent}
        named = instrument.refused_operations(entries)  # the query itself, unless the text names another
        if any(e.code in COMMAND_ERROR_CODES for e in entries):
            message = (f"{label}: the instrument refused {named} of dialect {instrument.dialect.name} "
                       f"and sent no reply to {fault.operation}: {listed}")
            self.emit(label, "scpi-error", "error", message, details)
            raise CommandRefused(message, entries) from None
        message = f"{label}: no reply to {fault.operation} ({fault.sent!r}); the instrument reports: {listed}"
        self.emit(label, "scpi-error", "warning", message, details)
        raise ScpiErrors(message, entries) from None

    def _backoff(self, attempt: int, label: str) -> None:
        # A wait on an Event, not a fixed sleep: a stop request (the watchdog, SIGTERM cleanup)
        # ends it at once instead of after the whole backoff.
        if self.stop.wait(self.policy.wait_s(attempt)):
            raise RecoveryStopped(f"{label}: recovery stopped: the run is stopping")
