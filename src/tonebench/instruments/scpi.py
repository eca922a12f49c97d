"""A generic SCPI instrument: role operations in, the dialect's strings out, parsed replies back."""

from __future__ import annotations

import threading
from collections.abc import Callable

import pyvisa

from tonebench.errors import InstrumentError
from tonebench.instruments.dialect import Dialect
from tonebench.instruments.scpi_errors import (  # re-exported: the role drivers and the run name them here
    COMMAND_ERROR_CODES,
    EXPECTED_REPLIES,
    CommandRefused,
    ConnectionFault,
    IdentityChanged,
    ImpossibleReading,
    LimitError,
    NotANumber,
    ScpiError,
    ScpiErrors,
    identity,
    parse_reply,
    refused_operations,
    split_replies,
)
from tonebench.instruments.supervision import Supervision
from tonebench.instruments.transport import connect

# Bounded so an instrument that never reports "no error" cannot hang the drain.
MAX_ERROR_READS = 50
# How long the error queue is given to answer after a query got no reply. An instrument that is
# up answers SYST:ERR? in milliseconds; a stalled one must not cost a second full timeout.
ERROR_QUERY_TIMEOUT_S = 1.0

# Operations remembered since the error queue was last read, to name the one it refused.
MAX_SENT_REMEMBERED = 20
# Reply lines read while resynchronising before giving up on this connection.
MAX_RESYNC_LINES = 20


class ScpiInstrument:
    """An open VISA resource driven through a dialect; `label` ("source1") names it in errors.

    With a `supervision` (tonebench.instruments.supervision.Supervision), a timeout or a dropped
    connection is retried per its policy; `epoch` counts the times the connection was reopened,
    so a caller can tell that a reading spans a reconnect, and the role drivers' restore hooks
    re-apply their settings on each reopen.
    """

    def __init__(self, resource, dialect: Dialect, label: str, supervision: Supervision | None = None,
                 visa_library: str = ""):
        self.resource = resource
        self.visa_library = visa_library  # reconnections go through the same VISA library
        self.dialect = dialect
        self.label = label
        self.supervision = supervision
        self.epoch = 0
        # Held for a whole call including its recovery, so a second thread (the watchdog) never
        # interleaves its lines with a query in flight.
        self.io_lock = threading.RLock()
        self._idn: str | None = None
        self._resource_name: str | None = getattr(resource, "resource_name", None)
        self._restore_hooks: list[Callable[[], None]] = []
        self._restoring = False
        # (operation, text) written since the error queue was last drained: named in a refusal.
        self._sent_since_drain: list[tuple[str, str]] = []
        # False once the error queue read empty with nothing sent after it: a drain then is
        # skipped (no command can have left an entry). True at the start and after a reopen.
        self._unchecked = True

    def has(self, operation: str) -> bool:
        return operation in self.dialect.operations

    @property
    def resource_name(self) -> str | None:
        """The VISA resource string this instrument was opened with (None if not known)."""
        return self._resource_name

    def add_restore_hook(self, hook: Callable[[], None]) -> None:
        """Call `hook` after each reopened connection (calls made inside it are not retried)."""
        self._restore_hooks.append(hook)

    def call(self, operation: str, **fields):
        """Send one operation; for a query return its parsed reply."""
        op = self._operation(operation)
        message = op.template.format(**fields)
        if operation != "next_error":
            self._unchecked = True
            self._sent_since_drain = [*self._sent_since_drain[-(MAX_SENT_REMEMBERED - 1):], (operation, message)]
        return self._supervised(lambda: self._exchange(operation, op, message, None))

    def call_many(self, steps: list[tuple[str, dict]], timeout_s: float | None = None) -> list:
        """Run (operation, fields) steps in order; returns the queries' parsed replies in order.

        With the dialect's `[io] one_line = true` they go as one program message, units joined
        by ';' (IEEE 488.2; each unit after the first from the root, ':', unless a common command)
        and the queries' replies come back in one line, joined by ';': one round trip instead of
        one per query. An error entry's text is quoted, so its reply is split outside quotes;
        queries whose reply is free text (an identity) are never joined. timeout_s: for the
        line's reply (a wait_complete in it), else the dialect's."""
        ops = [(operation, self._operation(operation), fields) for operation, fields in steps]
        if not self.dialect.io.one_line or len(ops) < 2 or any(op.reply == "text" for _, op, _ in ops):
            replies = []
            for operation, op, fields in ops:
                if operation == "wait_complete" and timeout_s is not None:
                    self.wait_complete(timeout_s)
                    replies.append(1)
                elif op.is_query:
                    replies.append(self.call(operation, **fields))
                else:
                    self.call(operation, **fields)
            return replies
        units = [op.template.format(**fields) for _, op, fields in ops]
        for (operation, _, _), unit in zip(ops, units):
            if operation != "next_error":
                self._unchecked = True
                self._sent_since_drain = [*self._sent_since_drain[-(MAX_SENT_REMEMBERED - 1):], (operation, unit)]
        message = ";".join([units[0], *(u if u.startswith(("*", ":")) else f":{u}" for u in units[1:])])
        queries = [(operation, op.reply) for operation, op, _ in ops if op.is_query]
        names = "+".join(operation for operation, _, _ in ops)

        def attempt():
            reply = self._transfer(names, message, bool(queries), timeout_s)
            if reply is None:
                return []
            parts = split_replies(reply)
            if parts is None or len(parts) != len(queries):  # most often another query's late reply
                raise ConnectionFault(f"{self.label}: {names} ({message!r}) replied {reply!r}; expected "
                                      f"{len(queries)} replies joined by ';' (quotes closed)", timed_out=True)
            return [self._parse(operation, message, kind, part) for (operation, kind), part in zip(queries, parts)]

        return self._supervised(attempt)

    def call_many_checked(self, steps: list[tuple[str, dict]], timeout_s: float | None = None) -> list:
        """call_many, then the error queue drained (check_errors). The first error read goes on
        the same line where the dialect joins (one round trip for the steps and their errors)."""
        if not steps:
            self.check_errors()
            return []
        *replies, first = self.call_many([*steps, ("next_error", {})], timeout_s)
        self.check_errors(first)
        return replies

    def _operation(self, operation: str):
        op = self.dialect.operations.get(operation)
        if op is None:
            raise InstrumentError(
                f"{self.label}: dialect {self.dialect.name} has no operation '{operation}'"
            )
        return op

    def _supervised(self, attempt: Callable[[], object]):
        with self.io_lock:
            if self.supervision is None or self._restoring:
                return attempt()
            return self.supervision.run(self, attempt)

    def _exchange(self, operation: str, op, message: str, timeout_s: float | None):
        """One write (and reply) on the current connection; ConnectionFault if the link failed."""
        reply = self._transfer(operation, message, op.is_query, timeout_s)
        return None if reply is None else self._parse(operation, message, op.reply, reply)

    def _transfer(self, operation: str, message: str, is_query: bool, timeout_s: float | None) -> str | None:
        """Write `message`, and for a query return the reply line; ConnectionFault if the link failed."""
        resource = self.resource
        previous_ms = resource.timeout if timeout_s is not None else None
        try:
            if previous_ms is not None:
                resource.timeout = max(1, round(timeout_s * 1000))
            if not is_query:
                resource.write(message)
                return None
            reply = resource.query(message)
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                waited_s = resource.timeout / 1000
                raise ConnectionFault(
                    f"{self.label}: no reply to {operation} ({message!r}) within {waited_s:g} s",
                    timed_out=True, operation=operation, sent=message,
                ) from None
            raise ConnectionFault(f"{self.label}: {operation} ({message!r}) failed: {exc}", timed_out=False) from None
        except (OSError, pyvisa.errors.InvalidSession) as exc:  # dropped or closed (pyvisa-py sockets)
            raise ConnectionFault(f"{self.label}: {operation} ({message!r}) failed: {exc}", timed_out=False) from None
        finally:
            if previous_ms is not None:
                try:
                    resource.timeout = previous_ms
                except (pyvisa.errors.Error, OSError):
                    pass  # the connection is gone; a reopened one gets the dialect's timeout
        if self.supervision is not None:
            self.supervision.activity()
        return reply

    def _parse(self, operation: str, message: str, kind: str, reply: str):
        try:
            return parse_reply(kind, reply)
        except NotANumber:
            where = f"{self.label}: {operation} ({message!r})"  # built only for the error
            raise ImpossibleReading(f"{where} replied {reply!r}: the instrument's not-a-number "
                                    "(SCPI 9.91E37, NaN or inf), not a reading") from None
        except ValueError:
            where = f"{self.label}: {operation} ({message!r})"
            # A reply of the wrong shape is most often another query's reply arriving late:
            # worth a resynchronisation, like a timeout.
            raise ConnectionFault(
                f"{where} replied {reply!r}; expected {EXPECTED_REPLIES[kind]}", timed_out=True
            ) from None

    def check_errors(self, first: ScpiError | None = None) -> None:
        """Drain the error queue; raise ScpiErrors listing every entry if there were any.

        first: the queue's first entry, already read (on the line of the operations it checks).
        Nothing is read when the queue read empty and nothing was sent since."""
        if first is None and not self._unchecked:
            return
        entries: list[ScpiError] = []
        for index in range(MAX_ERROR_READS):
            entry = first if index == 0 and first is not None else self.call("next_error")
            if entry.code == 0:
                self._unchecked = False  # read to its end
                break
            entries.append(entry)
        else:
            entries.append(ScpiError(0, f"error queue not empty after {MAX_ERROR_READS} reads"))
        if not entries:
            self._sent_since_drain = []  # the queue is read: nothing sent before is named later
            return
        named = self.refused_operations(entries)
        listed = "; ".join(f"{e.code}, {e.message}" for e in entries)
        refused = any(e.code in COMMAND_ERROR_CODES for e in entries)
        if refused:
            listed = f"the instrument refused {named} of dialect {self.dialect.name}: {listed}"
        if self.supervision is not None:
            self.supervision.emit(self.label, "scpi-error", "error" if refused else "warning",
                                  f"{self.label}: {listed}", {"entries": [list(e) for e in entries]})
        if refused:
            raise CommandRefused(f"{self.label}: {listed}", entries)
        raise ScpiErrors(f"{self.label}: {listed}", entries)

    def refused_operations(self, entries: list[ScpiError]) -> str:
        """Which operations sent since the queue was last read these entries are about (see
        refused_operations); forgets them, as the queue has now been read."""
        sent, self._sent_since_drain = self._sent_since_drain, []
        return refused_operations(sent, entries)

    def errors_after_no_reply(self) -> list[ScpiError] | None:
        """After a query got no reply: the error queue's entries, read on the same connection
        with a short timeout and no supervision; None when the queue gave no usable answer
        (a stalled instrument, or the late reply of the query arrived instead)."""
        op = self.dialect.operations.get("next_error")
        if op is None:
            return None
        entries: list[ScpiError] = []
        with self.io_lock:
            for _ in range(MAX_ERROR_READS):
                try:
                    entry = self._exchange("next_error", op, op.template,
                                           min(ERROR_QUERY_TIMEOUT_S, self.dialect.io.query_timeout_s))
                except ConnectionFault:
                    return entries or None
                if entry.code == 0:
                    break
                entries.append(entry)
        return entries

    def configure(self, steps: list[tuple[str, dict]], wait_s: float | None = None, sent: bool = False) -> None:
        """Run (operation, fields) steps in order, wait for *OPC? if `wait_s` is given (s), then
        drain the error queue. Under supervision, steps that left errors are sent again, as often
        as the policy retries. sent: the steps were written already (call_many); the first
        attempt only waits and reads the errors."""
        attempts = 1
        if self.supervision is not None and not self._restoring:
            attempts += self.supervision.policy.retries
        wait = [("wait_complete", {})] if wait_s is not None else []
        for attempt in range(attempts):
            # The error queue's first entry on the same line where the dialect joins.
            todo = [] if sent and attempt == 0 else steps
            *replies, first = self.call_many([*todo, *wait, ("next_error", {})], wait_s)
            if wait and replies[-1] != 1:
                raise InstrumentError(f"{self.label}: wait_complete replied {replies[-1]}; expected 1")
            try:
                self.check_errors(first)
                return
            except ScpiErrors:
                if attempt == attempts - 1:
                    raise

    def wait_complete(self, timeout_s: float) -> None:
        """Block on *OPC? (the wait_complete operation) for up to `timeout_s` seconds."""
        op = self._operation("wait_complete")
        done = self._supervised(lambda: self._exchange("wait_complete", op, op.template, timeout_s))
        if done != 1:
            raise InstrumentError(f"{self.label}: wait_complete replied {done}; expected 1")

    @property
    def idn(self) -> str:
        """The identify reply, queried once."""
        if self._idn is None:
            self._idn = self.call("identify")
        return self._idn

    def resync(self) -> list[str] | None:
        """After a timeout: ask for the identity and discard reply lines until it comes back.

        Replies on one connection come in the order of the queries, so once the identity is
        read no late reply can follow. Returns the discarded lines, or None when the identity
        did not come back (the connection must be reopened).
        """
        if self._idn is None:
            return None
        discarded: list[str] = []
        with self.io_lock:
            try:
                self.resource.write(self.dialect.operations["identify"].template)
                for _ in range(MAX_RESYNC_LINES):
                    line = self.resource.read().strip()
                    if line == self._idn:
                        return discarded
                    discarded.append(line)
            except (pyvisa.errors.Error, OSError):
                return None
        return None

    def reopen(self) -> str:
        """Close and open the connection again, check it is the same instrument, run the restore
        hooks. Returns the identify reply; raises Unreachable, IdentityChanged or ConnectionFault."""
        if self._resource_name is None:
            raise InstrumentError(f"{self.label}: cannot reopen: its resource string is unknown")
        with self.io_lock:
            self.close()
            handle, idn = connect(self._resource_name, self.dialect, self.label, self.visa_library)
            if self._idn is not None and identity(idn) != identity(self._idn):
                handle.close()
                raise IdentityChanged(
                    f"{self.label}: a different instrument answers at {self._resource_name}: "
                    f"{idn!r} instead of {self._idn!r}"
                )
            self.resource = handle
            self._idn = self._idn or idn
            self.epoch += 1
            self._unchecked = True  # a rebooted instrument may hold entries of its own
            self._restoring = True
            try:
                for hook in self._restore_hooks:
                    hook()
            finally:
                self._restoring = False
            return idn

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


# PON, bit 7 of the standard event status register (*ESR?): set at power-on, cleared by reading it
# (IEEE 488.2, from memory).
POWER_ON_BIT = 1 << 7

__all__ = [
    "COMMAND_ERROR_CODES", "CommandRefused", "ConnectionFault", "EXPECTED_REPLIES", "IdentityChanged",
    "ImpossibleReading", "LimitError", "NotANumber", "RoleDriver", "ScpiError", "ScpiErrors", "ScpiInstrument",
    "identity", "parse_reply",
]
