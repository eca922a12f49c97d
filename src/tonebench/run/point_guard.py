"""Measuring one point so that a fault never ends up as a wrong stored reading.

The instrument layer already retries and reconnects (instruments/supervision.py). Here, around a
whole point: an attempt that raised an instrument error, that spans a reopened connection (any
instrument's epoch changed), whose sources no longer hold what was set (a reset or power cycle,
found by reading them back), or whose tone levels were still moving (a repeat read disagrees) is
measured again after every setting is re-applied. After `attempts` tries the point fails with the
last reason, and the caller stores it as failed. An impossible reading (instruments/scpi.py
ImpossibleReading: not a number, or a level no instrument can produce) fails the point at once.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Generic, TypeVar

from tonebench.errors import InstrumentError, TonebenchError
from tonebench.instruments.scpi import (
    CommandRefused,
    IdentityChanged,
    ImpossibleReading,
    ScpiInstrument,
)
from tonebench.instruments.source import SignalSource
from tonebench.instruments.supervision import RecoveryStopped
from tonebench.plan.axes import point_name_of_key

T = TypeVar("T")

EventSink = Callable[[str, str, str, dict], None]  # (level, kind, message, details)


class PointFailed(TonebenchError):
    """A point could not be measured within its attempts; the message is the reason stored."""


class BenchFault(InstrumentError):
    """A fault of the bench itself that measuring again cannot cure (a leveling correction beyond
    its limit: a loose cable; a sensor reading out of range): the run stops."""


# Errors that end the run rather than one point: a different instrument, a stop request, a bench
# fault, an operation the instrument refused as a command error (the dialect does not fit it).
NOT_RETRIED = (IdentityChanged, RecoveryStopped, BenchFault, CommandRefused)


class PointGuard(Generic[T]):
    """Runs measure() for one point until it gives a reading that can be trusted."""

    def __init__(
        self,
        instruments: Sequence[ScpiInstrument],
        sources: Sequence[SignalSource],
        restore_all: Callable[[], None],
        log: EventSink,
        attempts: int = 3,
        kick: Callable[[], None] = lambda: None,
        check: Callable[[], None] = lambda: None,
    ):
        self.instruments = instruments
        self.sources = sources
        self.restore_all = restore_all
        self.log = log
        self.attempts = attempts
        self.kick = kick  # progress was made (the watchdog)
        self.check = check  # raises when the run must stop (the watchdog tripped)

    def measure(self, point_key: str, measure: Callable[[], T],
                confirm: Callable[[T], str | None] = lambda result: None) -> T:
        """measure() until trusted; confirm(result) returns why a result cannot be trusted, or None.

        Raises PointFailed after `attempts` tries; errors in NOT_RETRIED and non-instrument errors
        (limits, bad input) pass through at once.
        """
        reason = "no attempt made"
        for attempt in range(1, self.attempts + 1):
            self.check()
            self.kick()
            epochs = self._epochs()
            try:
                result = measure()
                self.kick()
                reason = confirm(result) or self._state_lost() or self._reopened(epochs)
            except NOT_RETRIED:
                raise
            except ImpossibleReading as exc:
                # Not measured again: a level beyond damage must not get RF once more, and a reply
                # that is no reading is stored as a failed point (resume measures it again).
                self.check()
                self.log("error", "impossible-reading", f"point {point_name_of_key(point_key)}: {exc}", {"point_key": point_key})
                raise PointFailed(f"impossible reading: {exc}") from None
            except InstrumentError as exc:
                reason = str(exc)
            self.check()  # a reading finished after the watchdog switched RF off is not kept
            if reason is None:
                return result
            if attempt == self.attempts:
                break
            self.log("warning", "point-retry",
                     f"point {point_name_of_key(point_key)}: measured again ({attempt + 1} of {self.attempts}): {reason}",
                     {"point_key": point_key, "attempt": attempt + 1})
            self._reapply(point_key)
        raise PointFailed(f"failed after {self.attempts} attempts: {reason}")

    def _epochs(self) -> tuple[int, ...]:
        return tuple(inst.epoch for inst in self.instruments)

    def _reopened(self, epochs: tuple[int, ...]) -> str | None:
        changed = [inst.label for inst, epoch in zip(self.instruments, epochs) if inst.epoch != epoch]
        return f"connection to {', '.join(changed)} reopened during the point" if changed else None

    def _state_lost(self) -> str | None:
        """Ask the sources: a reset or power cycle shows as the power-on bit, RF off or default
        settings (SignalSource.state_lost)."""
        lost = [text for text in (source.state_lost() for source in self.sources) if text]
        if not lost:
            return None
        message = "; ".join(lost)
        self.log("warning", "state-lost", f"settings lost (instrument reset?): {message}", {})
        return message

    def _reapply(self, point_key: str) -> None:
        try:
            self.restore_all()
        except NOT_RETRIED:
            raise
        except InstrumentError as exc:
            # The next attempt starts with the same settings anyway; its failure says more.
            self.log("warning", "reapplied", f"point {point_name_of_key(point_key)}: re-applying settings failed: {exc}", {})
            return
        self.log("info", "reapplied", f"point {point_name_of_key(point_key)}: every instrument setting sent again", {})


def settle_check(first_dbm: Sequence[float], again_dbm: Sequence[float], tolerance_db: float,
                 labels: Sequence[str] = ("f1", "f2")) -> str | None:
    """Why two reads of the same tones disagree by more than tolerance_db (dB), or None.

    A source whose level is still settling after a change reads differently a moment later.
    """
    if tolerance_db <= 0:
        return None
    moved = [f"{label} {a:.2f} then {b:.2f} dBm" for label, a, b in zip(labels, first_dbm, again_dbm)
             if abs(b - a) > tolerance_db]
    if not moved:
        return None
    return f"tone level still settling ({', '.join(moved)}; tolerance {tolerance_db:g} dB)"
