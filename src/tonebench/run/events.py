"""Relaying what the instruments report to a run that does not exist yet when they are opened:
their events, held until the run's log exists, and their activity, for the run's watchdog."""

from __future__ import annotations

from collections.abc import Callable

from tonebench.instruments.supervision import InstrumentEvent
from tonebench.run.event_log import RunLog


class EventRelay:
    """The supervision's event and activity callbacks: events held until the run's log exists,
    then passed on; activity passed to the watchdog once there is one."""

    def __init__(self):
        self.log: RunLog | None = None
        self._early: list[InstrumentEvent] = []
        self._on_activity: Callable[[], None] | None = None

    def __call__(self, event: InstrumentEvent) -> None:
        if self.log is None:
            self._early.append(event)
        else:
            self.log.instrument_event(event)

    def activity(self) -> None:
        if self._on_activity is not None:
            self._on_activity()

    def attach(self, log: RunLog, on_activity: Callable[[], None] | None = None) -> None:
        """From now on events go to `log` (those held first) and activity to `on_activity`."""
        self.log = log
        self._on_activity = on_activity
        for event in self._early:
            # From opening the bench, before the run existed: said then, if at all (e.g. a
            # source found with RF on is a warning line), so stored now but not repeated.
            log.instrument_event(event, said=True)
        self._early.clear()
