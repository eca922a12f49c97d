"""A run's points committed on one writer thread, so the next point's commands overlap the
commit (sqlite3 and psycopg release the GIL while they write; the measuring thread waits on
sockets meanwhile).

Each point is still its own transaction (store_point), in the order measured. At most one point
is uncommitted at any time: a point is handed over only once the one before it is committed,
and that commit's error (a full disk, a database locked past its busy timeout) is raised on the
measuring thread there, the same exception a direct commit would have raised. A hard kill of
the process loses at most the point being committed; `wait` before the run's end is stored.
"""

from __future__ import annotations

from concurrent.futures import Future, ThreadPoolExecutor

from sqlalchemy.orm import sessionmaker

from tonebench.store.point_record import PointRecord
from tonebench.store.point_writer import store_point


class PointCommitter:
    def __init__(self, sessions: sessionmaker, run_id: int):
        self._sessions = sessions
        self._run_id = run_id
        self._executor: ThreadPoolExecutor | None = None
        self._pending: Future | None = None

    def submit(self, record: PointRecord) -> None:
        """Hand the point to the writer thread once the one before is committed (its error is
        raised here, and this point is then not handed over)."""
        self.wait()
        if self._executor is None:
            self._executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="tonebench-points")
        self._pending = self._executor.submit(store_point, self._sessions, self._run_id, record)

    def wait(self) -> None:
        """Block until every handed-over point is committed; raise its commit's error."""
        pending = self._pending
        if pending is None:
            return
        try:
            pending.result()  # a Ctrl-C here leaves it pending: the next wait waits again
        except Exception:
            self._pending = None
            raise
        self._pending = None

    def close(self) -> None:
        """Wait for the last commit (raising its error), then end the writer thread."""
        try:
            self.wait()
        finally:
            if self._executor is not None:
                self._executor.shutdown(wait=True)
                self._executor = None
