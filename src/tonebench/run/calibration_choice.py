"""Which path losses a run uses: a named calibration set, else the bench file's [offsets]."""

from __future__ import annotations

import threading
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import sessionmaker

from tonebench.calibration.sets import CalibrationView, bench_file_set, load_set
from tonebench.config.bench_file import LoadedBench
from tonebench.errors import InputError
from tonebench.planes.loss_table import LossTable
from tonebench.planes.referral import check_coverage

# A busy SQLite file refuses a read-then-write transaction at once; tries before giving up.
SET_WRITE_ATTEMPTS = 20


def offsets_from_bench(bench: LoadedBench) -> dict[str, LossTable]:
    origin = f"bench file {bench.path}"
    tables = bench.settings.offsets
    if tables is None:
        raise InputError(
            f"bench file {bench.path}: no [offsets] table and no calibration set; add [offsets], set "
            "[bench] calibration or pass --cal NAME (see `tonebench cal list`)"
        )
    return {path: LossTable.from_rows(path, getattr(tables, path), origin) for path in ("in1", "in2", "out")}


@dataclass
class ChosenCalibration:
    """The path losses a run uses; view is None for a bench file's [offsets]."""

    tables: dict[str, LossTable]
    view: CalibrationView | None
    stale_message: str | None = None


def choose_calibration(bench: LoadedBench, cal_name: str | None, sessions: sessionmaker | None,
                       points: list, plan_origin: str) -> ChosenCalibration:
    """The named set (refused when expired or not covering the plan), else the bench file's [offsets]."""
    pairs = sorted({(p.f1_hz, p.f2_hz) for p in points})
    if cal_name is None:
        tables = offsets_from_bench(bench)
        check_coverage(tables, pairs, f"{plan_origin}: bench file {bench.path} [offsets]")
        return ChosenCalibration(tables, None)
    with sessions() as session:
        view = load_set(session, cal_name)
    status = view.status()
    if status == "expired":
        raise InputError(
            f"{view.label}: expired on {view.expired_at:%Y-%m-%d %H:%M} UTC; measure or import a new set"
        )
    check_coverage(view.tables, pairs, f"{plan_origin}: {view.label}")
    message = None
    if status == "stale":
        message = (
            f"{view.label} is {view.age_days():.1f} days old, past its validity of {view.valid_days:g} days; "
            "the run goes ahead with it"
        )
    return ChosenCalibration(view.tables, view, message)


def calibration_set_id(sessions: sessionmaker, chosen: ChosenCalibration, bench: LoadedBench, bench_path: Path) -> int:
    """The stored set the run points at: the named one, or the bench file's [offsets] stored as one."""
    if chosen.view is not None:
        return chosen.view.id
    return _bench_file_set_id(sessions, bench, bench_path, chosen.tables)


def _bench_file_set_id(sessions, bench: LoadedBench, bench_path: Path, offsets) -> int:
    """The bench file's [offsets] set, created if new. On SQLite a transaction that read before it
    writes is refused at once ("database is locked", busy timeout or not) while another process
    holds the write lock (a second run starting on the same bench takes it): try again, bounded."""
    for attempt in range(SET_WRITE_ATTEMPTS):
        try:
            with sessions.begin() as session:
                return bench_file_set(session, bench.settings.bench.name, str(bench_path), offsets)
        except OperationalError as exc:
            if "locked" not in str(exc) or attempt == SET_WRITE_ATTEMPTS - 1:
                raise
            threading.Event().wait(0.05 * (attempt + 1))
    raise AssertionError("unreachable")
