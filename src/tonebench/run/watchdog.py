"""A watchdog for unattended runs: when the sequencer stops making progress, RF goes off.

The run's thread kicks it at every step of a point. If no kick comes for `timeout_s` seconds
(an instrument that hangs beyond its timeouts, a database that blocks), a thread of its own calls
`on_trip` once, which switches RF off through a path that does not need the stuck thread
(SignalSource.force_rf_off, retried until read back off: tonebench.instruments.rf_guard), and the run's
thread stops at its next check (WatchdogTripped). stop() waits for on_trip to finish, so the
run's end is stored only once the RF-off attempts are over.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable

from tonebench.errors import TonebenchError

_log = logging.getLogger(__name__)


class WatchdogTripped(TonebenchError):
    """The run made no progress for longer than the watchdog allows; RF was switched off."""


class Watchdog:
    """Calls on_trip(reason) once if kick() is not called for timeout_s seconds."""

    def __init__(self, timeout_s: float, on_trip: Callable[[str], None]):
        if timeout_s <= 0:
            raise ValueError("Watchdog timeout_s must be > 0")
        self.timeout_s = timeout_s
        self.on_trip = on_trip
        self.tripped: str | None = None
        self._last_kick_s = time.monotonic()
        self._done = threading.Event()
        self._thread: threading.Thread | None = None

    def __enter__(self) -> Watchdog:
        self.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.stop()

    def start(self) -> None:
        self.kick()
        self._thread = threading.Thread(target=self._watch, name="tonebench-watchdog", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        self._done.set()
        if self._thread is not None and self._thread is not threading.current_thread():
            self._thread.join()
        self._thread = None

    def kick(self) -> None:
        """Progress was made."""
        self._last_kick_s = time.monotonic()

    def check(self) -> None:
        """Raise WatchdogTripped in the run's thread once the watchdog has tripped."""
        if self.tripped is not None:
            raise WatchdogTripped(self.tripped)

    def _watch(self) -> None:
        # Event waits, not sleeps: stop() ends the watch at once.
        poll_s = min(1.0, self.timeout_s / 4)
        while not self._done.wait(poll_s):
            idle_s = time.monotonic() - self._last_kick_s
            if idle_s > self.timeout_s:
                self.tripped = f"watchdog: no progress for {idle_s:.1f} s (limit {self.timeout_s:g} s)"
                try:
                    self.on_trip(self.tripped)
                except Exception:  # noqa: BLE001 - the reason still stops the run
                    _log.exception("watchdog action failed")
                return
