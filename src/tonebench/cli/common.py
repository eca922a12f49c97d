"""What every tonebench command shares: consoles, the --db option, one-line error handling."""

from __future__ import annotations

import logging
import time
from contextlib import contextmanager
from pathlib import Path
from typing import Annotated, Iterator

import typer
from rich.console import Console

from tonebench.errors import DatabaseError, InputError, TonebenchError

# soft_wrap: paths and one-line errors stay on one line whatever the terminal width.
out = Console(soft_wrap=True)
err = Console(stderr=True, soft_wrap=True)


def database(option: str | None) -> str:
    """The URL of the database a command uses: --db (a URL, or a plain path meaning an SQLite
    file), else TONEBENCH_DB, the per-user config file, or tonebench.db here
    (config/database_location.py). Called inside one_line_errors: a bad value is one line."""
    from tonebench.config.database_location import choose_database

    return choose_database(option).url


DbOption = Annotated[
    str | None,
    typer.Option("--db",
                 help="Database: a file path (SQLite) or a SQLAlchemy URL. Default: the TONEBENCH_DB environment "
                      "variable, else `database` in the per-user config.toml, else tonebench.db in the current folder."),
]


@contextmanager
def one_line_errors() -> Iterator[None]:
    """Bad input: one line and exit 2. Instrument or other tonebench failures: one line and exit 1.
    Ctrl-C: one line and exit 130; SIGTERM: one line and exit 143 (while the command runs, only
    the first of several signals is acted on, so the cleanup it starts runs to its end). A
    source not confirmed off makes any of them exit 1 with a line naming it."""
    from tonebench.instruments.rf_guard import SIGINT_EXIT, SIGTERM_EXIT, Terminated, note_of, stop_signals

    with stop_signals():
        try:
            yield
        except (InputError, DatabaseError) as exc:
            _say(note_of(exc), f"error: {exc}", 2)
        except TonebenchError as exc:
            _say(note_of(exc), f"error: {exc}", 1)
        except KeyboardInterrupt as exc:
            _say(note_of(exc), "interrupted by Ctrl-C", SIGINT_EXIT)
        except Terminated as exc:
            _say(note_of(exc), "terminated by SIGTERM", SIGTERM_EXIT)


def _say(note, line: str, exit_code: int) -> None:
    """Print the stop's one line (the runner's own when it gave one) and exit with its code."""
    if note is not None:
        line, exit_code = note.line, note.exit_code
    err.print(line, markup=False, highlight=False, soft_wrap=True)
    raise typer.Exit(exit_code) from None


_installed: list[tuple[logging.Logger, logging.Handler]] = []
_EVENT_STYLES = {logging.WARNING: "yellow", logging.ERROR: "bold red"}


class LiveEvents(logging.Handler):
    """Run events on stderr as they happen, e.g. '13:20:01Z warning  point 2.45 GHz, ...: measured
    again (2 of 4): ...'; printed through the console a progress bar uses, so they go above it."""

    def emit(self, record: logging.LogRecord) -> None:
        from rich.text import Text

        at = time.strftime("%H:%M:%SZ", time.gmtime(record.created))
        level = record.levelname.lower()
        err.print(Text.assemble(f"{at} ", (f"{level:8}", _EVENT_STYLES.get(record.levelno, "")), record.getMessage()),
                  highlight=False)


def configure_logging(verbose: bool, trace_path: Path | None) -> None:
    """-v: tonebench's log (the SCPI trace included) on stderr; --trace: the SCPI trace appended
    to a file. Timestamps in UTC to the millisecond, like the database's."""
    for logger, handler in _installed:  # a second command in one process (tests) starts afresh
        logger.removeHandler(handler)
        handler.close()
        logger.setLevel(logging.NOTSET)
    _installed.clear()
    formatter = logging.Formatter("%(asctime)s.%(msecs)03dZ %(name)s %(message)s", "%Y-%m-%dT%H:%M:%S")
    formatter.converter = time.gmtime
    live = LiveEvents()  # a run's warnings and errors as they happen (all its events with -v)
    live.setLevel(logging.DEBUG if verbose else logging.WARNING)
    events = logging.getLogger("tonebench.events")
    events.addHandler(live)
    events.setLevel(logging.DEBUG)
    events.propagate = False  # -v's handler below would print each one twice
    _installed.append((events, live))
    if verbose:
        handler = logging.StreamHandler()
        handler.setFormatter(formatter)
        logger = logging.getLogger("tonebench")
        logger.addHandler(handler)
        logger.setLevel(logging.DEBUG)
        _installed.append((logger, handler))
    if trace_path is not None:
        try:
            handler = logging.FileHandler(trace_path, mode="a", encoding="utf-8")
        except OSError as exc:
            raise InputError(f"--trace {trace_path}: cannot write there ({exc.strerror or exc}); "
                             "give a file in an existing, writable folder") from None
        handler.setFormatter(formatter)
        scpi = logging.getLogger("tonebench.scpi")
        scpi.addHandler(handler)
        scpi.setLevel(logging.DEBUG)
        _installed.append((scpi, handler))


@contextmanager
def db_session(db: str | None, write: bool = False) -> Iterator:
    """A session on the --db database: read-only unless write (reading never creates one)."""
    from tonebench.store.database import open_database, session_factory

    engine = open_database(database(db), read_only=not write)  # reading never creates one
    try:
        sessions = session_factory(engine)
        with (sessions.begin() if write else sessions()) as session:
            yield session
    finally:
        engine.dispose()


def cell(value, spec: str = "+.2f") -> str:
    """A table cell: the value in `spec`, "-" for none."""
    return "-" if value is None else format(value, spec)
