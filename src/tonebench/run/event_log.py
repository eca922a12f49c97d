"""The run's event log: Event rows with the run, and the same lines in a plain-text file beside
the database, readable with any pager while the run goes on (or after the database is gone)."""

from __future__ import annotations

import datetime as dt
import logging
import threading
from pathlib import Path

from sqlalchemy.engine import make_url

from tonebench.instruments.supervision import InstrumentEvent

_log = logging.getLogger(__name__)
# Every run event, as it happens, for whoever watches (the CLI prints warnings and errors live).
events = logging.getLogger("tonebench.events")
LOG_LEVELS = {"debug": logging.DEBUG, "info": logging.INFO, "warning": logging.WARNING, "error": logging.ERROR}


def log_path_for(db_url: str) -> Path:
    """'<database>.log' beside an SQLite file; tonebench.log in the current folder otherwise."""
    url = make_url(db_url)
    database = url.database or ""
    if url.get_backend_name() == "sqlite" and database and database != ":memory:" and not database.startswith("file:"):
        path = Path(database).expanduser().resolve()
        return path.with_name(path.stem + ".log")
    return Path.cwd() / "tonebench.log"


class RunLog:
    """Writes each event to the store (through `recorder.event`) and appends it to `path`.

    Safe to call from several threads (the watchdog writes too).
    """

    def __init__(self, recorder, path: Path | None):
        self.recorder = recorder
        self.path = path
        self._lock = threading.Lock()

    def event(self, level: str, kind: str, message: str, details: dict | None = None, said: bool = False) -> None:
        """Store and append one event; `said`: already told to the user (not passed on live)."""
        self.line(level, kind, message)
        self.recorder.event(level, kind, message, details)
        if not said:
            events.log(LOG_LEVELS.get(level, logging.INFO), "%s", message, extra={"kind": kind, "run": self.recorder.guid})

    def instrument_event(self, event: InstrumentEvent, said: bool = False) -> None:
        """Callback for tonebench.instruments.supervision.Supervision."""
        self.event(event.level, event.kind, event.message, {"instrument": event.instrument, **event.details}, said)

    def line(self, level: str, kind: str, message: str) -> None:
        """Only the text file (for lines the store writes itself, like the run's start and end)."""
        if self.path is None:
            return
        at = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
        text = f"{at} run {self.recorder.guid[:8]} {level:7} {kind:12} {' '.join(message.split())}\n"
        try:
            with self._lock, open(self.path, "a", encoding="utf-8") as handle:
                handle.write(text)
        except OSError:
            _log.warning("cannot append to the log file %s", self.path)
