"""RF off on every way out: signals that cannot interrupt the cleanup, and RF off confirmed.

Two pieces shared by runs, resumes, queue workers and the calibration commands:

- `stop_signals()`: while it is active (main thread only), the first Ctrl-C (SIGINT) or SIGTERM
  raises KeyboardInterrupt or Terminated as usual, so the ordinary unwinding (the sequencer's
  `finally`, the run's closing record) runs; every later signal is only counted, never raised,
  so a second or fifth Ctrl-C cannot cut that cleanup short. `shielded()` defers even the first
  signal over a block (RF off, the closing record) and raises it once the block is done.
  `raise_if_stopping()`, called between points and calibration steps, raises the stop again if
  its exception was swallowed on the way (a finalizer that logs and goes on), so none is lost.
- `switch_rf_off(sources)`: RF off at every source, each confirmed by reading its state back,
  retried with a bounded backoff until each one reads off or the time allowed is spent. Every
  source is tried even when another raises (BaseException included). It never raises; the
  returned RfOffReport says which sources were read back off and which were not.

Exit codes of the command line (README, "Exit codes"): SIGTERM 143 (128 + 15, what a shell reports
for a process ended by SIGTERM), Ctrl-C 130 (128 + 2).
"""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field

SIGINT_EXIT = 130
SIGTERM_EXIT = 143
# How long RF off is retried on the way out before a source is reported as not confirmed off.
# Long enough for an instrument busy with a slow sweep or a short stall; short against the 90 s a
# service manager commonly allows between SIGTERM and SIGKILL (systemd's default, from memory).
RF_OFF_BUDGET_S = 30.0
RF_OFF_FIRST_WAIT_S = 0.1
RF_OFF_MAX_WAIT_S = 2.0


class Terminated(BaseException):
    """Raised in the main thread when the process receives SIGTERM, so RF-off cleanup runs.

    A BaseException, like KeyboardInterrupt, so that no `except Exception` on the way (an event
    callback, a best-effort close) can swallow the stop."""


@dataclass
class StopNote:
    """What the command line says about a stop (one line) and the exit code it ends with."""

    line: str
    exit_code: int


def attach_note(exc: BaseException, line: str, exit_code: int) -> None:
    """Give an exception the one line and exit code the command line reports it with."""
    exc.tonebench_note = StopNote(line, exit_code)  # type: ignore[attr-defined]


def note_of(exc: BaseException) -> StopNote | None:
    return getattr(exc, "tonebench_note", None)


# --- signals -----------------------------------------------------------------------------------


class _SignalState:
    def __init__(self) -> None:
        self.installs = 0
        self.shield_depth = 0
        self.raised: int | None = None  # the signal that was raised as an exception
        self.pending: int | None = None  # a signal deferred by a shield, to raise after it
        self.received: list[int] = []  # every signal seen while installed (tests, the log)

    def reset(self) -> None:
        self.__init__()


_state = _SignalState()


def exception_for(signum: int) -> BaseException:
    if signum == signal.SIGTERM:
        return Terminated("terminated by SIGTERM")
    return KeyboardInterrupt()


def _handler(signum, frame) -> None:
    _state.received.append(signum)
    if _state.raised is not None:
        return  # already stopping: the cleanup of the first signal must run to its end
    if _state.shield_depth > 0:
        if _state.pending is None:
            _state.pending = signum
        return
    _state.raised = signum
    raise exception_for(signum)


def _is_main_thread() -> bool:
    return threading.current_thread() is threading.main_thread()


@contextmanager
def stop_signals() -> Iterator[None]:
    """Ctrl-C and SIGTERM raise once, later ones are counted only (see the module docstring).
    Nested uses share one state; the outermost restores the previous handlers."""
    if not _is_main_thread():
        yield
        return
    previous = {sig: signal.getsignal(sig) for sig in (signal.SIGINT, signal.SIGTERM)}
    for sig in previous:
        signal.signal(sig, _handler)
    _state.installs += 1
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        _state.installs -= 1
        if _state.installs == 0:
            _state.reset()


@contextmanager
def shielded() -> Iterator[None]:
    """Defer Ctrl-C and SIGTERM over the block; a signal that came meanwhile is raised after it
    (unless one was raised before, in which case the stop is already under way)."""
    if not _is_main_thread() or _state.installs == 0:
        # No handler of ours (library use, another thread): the block runs as it is.
        yield
        return
    _state.shield_depth += 1
    try:
        yield
    finally:
        _state.shield_depth -= 1
    if _state.shield_depth == 0 and _state.pending is not None and _state.raised is None:
        signum, _state.pending = _state.pending, None
        _state.raised = signum
        raise exception_for(signum)


def raise_if_stopping() -> None:
    """At a safe point of a long loop (between points or steps): raise the stop again if its
    exception was swallowed on the way (a finalizer or a library that logs and goes on), so a
    signal is never lost. Later signals are not raised by the handler itself (see _handler)."""
    if _state.raised is not None and _state.shield_depth == 0 and _is_main_thread():
        raise exception_for(_state.raised)


# --- RF off, confirmed ---------------------------------------------------------------------------


@dataclass
class RfOffReport:
    """Which sources were read back off and which were not (label -> why)."""

    confirmed: list[str] = field(default_factory=list)
    unconfirmed: dict[str, str] = field(default_factory=dict)
    attempts: int = 0

    @property
    def ok(self) -> bool:
        return not self.unconfirmed

    def line(self) -> str:
        """'RF off at source1, source2 (read back)', or a loud line naming each source not confirmed."""
        parts = []
        if self.confirmed:
            parts.append(f"RF off at {', '.join(self.confirmed)} (read back)")
        if self.unconfirmed:
            named = "; ".join(f"{label}: {why}" for label, why in self.unconfirmed.items())
            parts.append(f"RF NOT CONFIRMED OFF at {', '.join(self.unconfirmed)} ({named}); "
                         "switch it off at the instrument")
        return "; ".join(parts) if parts else "no source to switch off"


def _off_once(source, force: bool) -> str | None:
    """One attempt at one source: None when its state was read back off, else why not."""
    try:
        if force:
            source.force_rf_off()
        else:
            source.rf_off()  # reads the state back, raises if still on
        return None
    except BaseException as exc:  # noqa: BLE001 - every source must be tried; signals are deferred
        why = (" ".join(str(exc).split()) or type(exc).__name__) if isinstance(exc, Exception) \
            else f"interrupted ({type(exc).__name__})"
    # The command failed (an error reported, a reply lost): its state read back decides.
    try:
        if source.rf_is_on() is False:
            return None
    except BaseException:  # noqa: BLE001 - unreadable: not confirmed
        pass
    return why


def switch_rf_off(sources: Sequence, *, budget_s: float = RF_OFF_BUDGET_S) -> RfOffReport:
    """RF off at every source, each read back; the ones not confirmed are tried again (through a
    fresh connection after the first try) with waits doubling from RF_OFF_FIRST_WAIT_S up to
    RF_OFF_MAX_WAIT_S, until all read off or `budget_s` is spent. Never raises; signals are
    deferred meanwhile."""
    report = RfOffReport()
    with shielded():
        deadline_s = time.monotonic() + budget_s
        todo = list(sources)
        why: dict[str, str] = {}
        wait_s = RF_OFF_FIRST_WAIT_S
        force = False
        while True:
            report.attempts += 1
            still = []
            for source in todo:
                reason = _off_once(source, force)
                if reason is None:
                    report.confirmed.append(source.label)
                    why.pop(source.label, None)
                else:
                    why[source.label] = reason
                    still.append(source)
            todo = still
            left_s = deadline_s - time.monotonic()
            if not todo or left_s <= 0:
                break
            # The bounded backoff before trying again, as an Event wait (like Supervision._backoff).
            threading.Event().wait(min(wait_s, left_s))
            wait_s = min(RF_OFF_MAX_WAIT_S, wait_s * 2.0)
            force = True
        order = [source.label for source in sources]
        report.confirmed.sort(key=order.index)
        report.unconfirmed = {label: why[label] for label in order if label in why}
    return report
