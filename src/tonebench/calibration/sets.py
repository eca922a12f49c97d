"""Calibration sets in the database: path losses with their provenance, validity and staleness.

A set holds up to three loss tables (in1, in2, out) and, once measured, the system residual per
(center, spacing). Functions here take an open Session; the caller owns the transaction, so a
set is stored whole or not at all.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import re
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from tonebench.errors import InputError
from tonebench.planes.loss_table import LossTable
from tonebench.planes.referral import PATHS
from tonebench.store.models import (
    CalibrationOffset,
    CalibrationSet,
    SystemResidual,
    utc_now,
)
from tonebench.units import format_freq

DEFAULT_VALID_DAYS = 30.0
MAX_VALID_DAYS = 3650.0
# Offsets typed into a bench file carry no date of their own: they never go stale here.
BENCH_FILE_VALID_DAYS = MAX_VALID_DAYS
NAME_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,99}")


@dataclass(frozen=True)
class CalibrationView:
    """A stored set, detached from the session: its provenance and its loss tables."""

    id: int
    name: str
    method: str
    created_at: dt.datetime
    operator: str | None
    instruments: list
    source_files: list
    freq_min_hz: float
    freq_max_hz: float
    valid_days: float
    expired_at: dt.datetime | None
    notes: str | None
    tables: dict[str, LossTable]
    residuals: list[dict] = field(default_factory=list)

    @property
    def label(self) -> str:
        return f"calibration set {self.name}"

    def age_days(self, now: dt.datetime | None = None) -> float:
        return ((now or utc_now()) - self.created_at).total_seconds() / 86400.0

    def status(self, now: dt.datetime | None = None) -> str:
        """'expired' (withdrawn by `cal expire`), 'stale' (older than its validity) or 'valid'."""
        if self.expired_at is not None:
            return "expired"
        if self.method != "bench-file" and self.age_days(now) > self.valid_days:
            return "stale"
        return "valid"


def check_name(name: str) -> str:
    if not NAME_PATTERN.fullmatch(name):
        raise InputError(
            f"calibration set name {name!r}: use 1 to 100 letters, digits, '.', '_' or '-', starting with a letter or digit"
        )
    return name


def check_valid_days(valid_days: float) -> float:
    if not 0.0 < valid_days <= MAX_VALID_DAYS:
        raise InputError(f"validity {valid_days:g} days: must be more than 0 and at most {MAX_VALID_DAYS:g} days")
    return valid_days


def tables_range_hz(tables: Mapping[str, LossTable]) -> tuple[float, float]:
    """The frequency range where every table of the set is defined (their intersection)."""
    low_hz = max(float(t.freqs_hz[0]) for t in tables.values())
    high_hz = min(float(t.freqs_hz[-1]) for t in tables.values())
    if low_hz > high_hz:
        ranges = ", ".join(f"{p} {format_freq(t.freqs_hz[0])} to {format_freq(t.freqs_hz[-1])}" for p, t in tables.items())
        raise InputError(f"the paths' frequency ranges do not overlap ({ranges})")
    return low_hz, high_hz


def find_set(session: Session, name: str) -> CalibrationSet | None:
    return session.scalars(select(CalibrationSet).where(CalibrationSet.name == name)).first()


def _require(session: Session, name: str) -> CalibrationSet:
    row = find_set(session, name)
    if row is None:
        known = session.scalars(select(CalibrationSet.name).order_by(CalibrationSet.name).limit(10)).all()
        hint = f"; known: {', '.join(known)}" if known else "; none stored yet (see `tonebench cal --help`)"
        raise InputError(f"calibration set '{name}': not in this database{hint}")
    return row


def _view(row: CalibrationSet) -> CalibrationView:
    origin = f"calibration set {row.name}"
    tables = {}
    for path in PATHS:
        rows = [(o.freq_hz, o.loss_db) for o in row.offsets if o.path == path]
        if rows:
            rows.sort()
            tables[path] = LossTable.from_rows(path, rows, origin)
    residuals = [
        {
            "center_hz": r.center_hz, "spacing_hz": r.spacing_hz, "atten_db": r.atten_db,
            "system_ip3_dbm": r.system_ip3_dbm, "source_ip3_dbm": r.source_ip3_dbm,
            "analyzer_ip3_dbm": r.analyzer_ip3_dbm, "sweep": r.sweep_json,
        }
        for r in sorted(row.residuals, key=lambda r: (r.center_hz, r.spacing_hz))
    ]
    return CalibrationView(
        id=row.id, name=row.name, method=row.method, created_at=row.created_at, operator=row.operator,
        instruments=list(row.instruments_json or []), source_files=list(row.source_files_json or []),
        freq_min_hz=row.freq_min_hz, freq_max_hz=row.freq_max_hz, valid_days=row.valid_days,
        expired_at=row.expired_at, notes=row.notes, tables=tables, residuals=residuals,
    )


def load_set(session: Session, name: str) -> CalibrationView:
    """The set called `name`; InputError naming the known sets if there is none."""
    return _view(_require(session, name))


def load_set_by_id(session: Session, set_id: int) -> CalibrationView:
    return _view(session.get(CalibrationSet, set_id))


def list_sets(session: Session) -> list[CalibrationView]:
    rows = session.scalars(select(CalibrationSet).order_by(CalibrationSet.created_at.desc(), CalibrationSet.id.desc()))
    return [_view(row) for row in rows]


def _offset_rows(tables: Mapping[str, LossTable]) -> list[CalibrationOffset]:
    return [
        CalibrationOffset(path=path, freq_hz=float(f), loss_db=float(loss))
        for path, table in tables.items()
        for f, loss in zip(table.freqs_hz, table.losses_db)
    ]


def create_set(
    session: Session,
    *,
    name: str,
    method: str,
    tables: Mapping[str, LossTable],
    valid_days: float = DEFAULT_VALID_DAYS,
    operator: str | None = None,
    instruments: list | None = None,
    source_files: list | None = None,
    notes: str | None = None,
    bench_id: int | None = None,
) -> CalibrationSet:
    """Add a new set (flushed, not committed). InputError if the name is taken or no path is given."""
    if not tables:
        raise InputError(f"calibration set '{name}': give at least one path (in1, in2 or out)")
    if find_set(session, name) is not None:
        raise InputError(f"calibration set '{name}' already exists; choose another name (sets are never overwritten)")
    low_hz, high_hz = tables_range_hz(tables)
    row = CalibrationSet(
        name=name, method=method, created_at=utc_now(), operator=operator, bench_id=bench_id,
        instruments_json=instruments or [], source_files_json=source_files or [],
        freq_min_hz=low_hz, freq_max_hz=high_hz, valid_days=check_valid_days(valid_days), notes=notes,
        offsets=_offset_rows(tables),
    )
    session.add(row)
    session.flush()
    return row


def add_paths(session: Session, name: str, tables: Mapping[str, LossTable], instruments: list, note: str) -> None:
    """Add paths the set does not have yet (e.g. 'out' after the input paths were measured)."""
    row = _require(session, name)
    present = {o.path for o in row.offsets}
    clash = sorted(set(tables) & present)
    if clash:
        raise InputError(f"calibration set '{name}' already has a '{clash[0]}' path; measure into a new set")
    existing = _view(row).tables
    low_hz, high_hz = tables_range_hz({**existing, **tables})
    row.offsets.extend(_offset_rows(tables))
    row.freq_min_hz, row.freq_max_hz = low_hz, high_hz
    row.instruments_json = [*(row.instruments_json or []), *instruments]
    row.notes = "; ".join(filter(None, [row.notes, note]))
    session.flush()


def replace_residuals(session: Session, name: str, residuals: list[dict]) -> None:
    """Store the system residual per (center, spacing); a re-measured pair replaces the old row."""
    row = _require(session, name)
    keys = {(r["center_hz"], r["spacing_hz"]) for r in residuals}
    row.residuals[:] = [r for r in row.residuals if (r.center_hz, r.spacing_hz) not in keys]
    session.flush()
    row.residuals.extend(SystemResidual(created_at=utc_now(), **r) for r in residuals)
    session.flush()


def expire_set(session: Session, name: str) -> dt.datetime:
    """Withdraw a set: runs refuse it from now on; stored runs keep referring to it."""
    row = _require(session, name)
    if row.expired_at is None:
        row.expired_at = utc_now()
    return row.expired_at


def bench_file_set(session: Session, bench_name: str, bench_path: str, tables: Mapping[str, LossTable]) -> int:
    """The set standing for a bench file's [offsets]: one per distinct content, reused by later runs."""
    content = {path: [[float(f), float(loss)] for f, loss in zip(t.freqs_hz, t.losses_db)] for path, t in sorted(tables.items())}
    digest = hashlib.sha256(json.dumps(content, sort_keys=True).encode("utf-8")).hexdigest()
    name = f"bench-file:{bench_name[:60]}:{digest[:12]}"
    row = find_set(session, name)
    if row is None:
        try:
            # Several workers may start runs with the same bench file at once: the loser of the
            # race on the unique name takes the winner's row, whether it loses at the insert
            # (IntegrityError) or at create_set's own check of the name (the winner committed
            # in between: InputError, seen on PostgreSQL).
            with session.begin_nested():
                row = create_set(
                    session, name=name, method="bench-file", tables=tables, valid_days=BENCH_FILE_VALID_DAYS,
                    source_files=[{"offset_path": "in1,in2,out", "file": bench_path, "sha256": digest}],
                    notes="the [offsets] table of a bench file, as typed there",
                )
        except (IntegrityError, InputError):
            row = find_set(session, name)
            if row is None:
                raise
    return row.id


def table_from_arrays(path: str, freqs_hz, losses_db, origin: str) -> LossTable:
    return LossTable(path, np.asarray(freqs_hz, dtype=float), np.asarray(losses_db, dtype=float), origin)
