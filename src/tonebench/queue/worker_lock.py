"""One worker per SQLite database file: SQLite has no row locks and one writer at a time, so a
worker holds an exclusive lock on a file beside the database (released by the OS if it dies)."""

from __future__ import annotations

import fcntl
from pathlib import Path

from sqlalchemy.engine import make_url

from tonebench.errors import InputError
from tonebench.store.ownership import process_owner


class SqliteWorkerLock:
    """An exclusive lock on '<database>.worker-lock' for the worker's lifetime (POSIX flock)."""

    def __init__(self, db_url: str):
        url = make_url(db_url)
        database = url.database or ""
        if not database or database == ":memory:" or database.startswith("file:"):
            raise InputError(f"worker: database {db_url} is not a file; a worker needs a database file or PostgreSQL")
        # Keyed by the file itself: a symlink or another spelling of the path names the same lock.
        resolved = Path(database).expanduser().resolve()
        self.path = resolved.with_name(resolved.name + ".worker-lock")
        self._file = None

    def acquire(self) -> None:
        handle = open(self.path, "a+")
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            handle.seek(0)
            holder = handle.read().strip() or "another process"
            handle.close()
            raise InputError(
                f"worker: {holder} already works on {self.path.with_suffix('')}; SQLite allows one worker "
                "per database file (use PostgreSQL for several)"
            ) from None
        handle.seek(0)
        handle.truncate()
        handle.write(process_owner())
        handle.flush()
        self._file = handle

    def release(self) -> None:
        if self._file is not None:
            self._file.close()  # closing drops the flock
            self._file = None
