"""Re-analysis of many runs across the machine's cores: each batch of runs read and assessed in a
worker process (stored_results.analyse_batch), the database writes left to the caller's process.

The assessment is pure Python and numpy per sweep, so one process uses one core; the writes are a
few bulk statements per batch and stay in one process (one writer, as SQLite wants). Workers are
forked: they start at once and never touch the caller's engine (each opens its own). The pool is
made before the first batch, so before `analyze --all` shows its progress bar (whose refresh
thread a fork must not copy).
"""

from __future__ import annotations

import multiprocessing
import os
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from functools import partial

from sqlalchemy.orm import sessionmaker

# Worker processes for re-analysis; 1 keeps everything in the calling process.
WORKERS = os.cpu_count() or 1


@dataclass
class AnalysedBatch:
    """What one batch's analysis stores: its run ids, result rows (in order), point flag rows and,
    per result, its flag rows and per-level rows (tied to the result's id once inserted)."""

    run_ids: list[int]
    results: list[dict]
    point_flags: list[dict]
    result_flags: list[list[dict]]
    levels: list[list[dict]]


# How one batch is read and assessed: (session, guids, cal_name) -> AnalysedBatch. The caller
# passes it in (stored_results.analyse_batch), so this module imports nothing of its caller's.
Analyse = Callable[..., AnalysedBatch]


def _analyse(sessions: sessionmaker, guids: list[str], cal_name: str | None, analyse: Analyse) -> AnalysedBatch:
    with sessions() as session:
        return analyse(session, guids, cal_name)


_worker_sessions: sessionmaker | None = None


def _start_worker(url: str) -> None:
    global _worker_sessions
    from tonebench.store import open_database, session_factory

    _worker_sessions = session_factory(open_database(url, upgrade=False))


def _in_worker(guids: list[str], cal_name: str | None, analyse: Analyse) -> AnalysedBatch:
    return _analyse(_worker_sessions, guids, cal_name, analyse)


def _worker_count(sessions: sessionmaker, n_batches: int) -> int:
    engine = sessions.kw.get("bind")
    if engine is None or "fork" not in multiprocessing.get_all_start_methods():
        return 1
    if engine.dialect.name == "sqlite" and engine.url.database in (None, "", ":memory:"):
        return 1  # an in-memory database exists only in this process
    return max(1, min(WORKERS, n_batches))


@contextmanager
def analysed_batches(sessions: sessionmaker, batches: list[list[str]], cal_name: str | None,
                     analyse: Analyse) -> Iterator[Iterator[AnalysedBatch]]:
    """The batches analysed, in order: in worker processes when there are several batches and
    cores, else here. A worker's error (an unknown GUID) is raised where its batch comes up."""
    workers = _worker_count(sessions, len(batches))
    if workers < 2:
        yield (_analyse(sessions, guids, cal_name, analyse) for guids in batches)
        return
    url = sessions.kw["bind"].url.render_as_string(hide_password=False)
    with multiprocessing.get_context("fork").Pool(workers, initializer=_start_worker, initargs=(url,)) as pool:
        yield pool.imap(partial(_in_worker, cal_name=cal_name, analyse=analyse), batches)
