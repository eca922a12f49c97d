"""Find stored results by device, conditions, date, flags and verdict.

One row per fitted result (one center/spacing/bias group of one run), with its device and run.
Every filter value is a bound parameter of a SQLAlchemy expression: user text never becomes SQL.
Several values for one field mean any of them; different fields must all hold.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import gc
import json
import math
from dataclasses import dataclass, fields

import sqlalchemy as sa
from sqlalchemy.orm import Session

from tonebench.errors import InputError
from tonebench.store.models import (
    FLAGS,
    VERDICTS,
    Device,
    Result,
    ResultFlag,
    Run,
)

_BOUND_IDS_MAX = 500  # flags of more results are fetched by the filter itself, not by bound ids


@dataclass(frozen=True)
class ResultFilter:
    """Which results to return. Ranges are inclusive, except `until` (runs started before it).

    flags: results carrying any of these flags on the result itself.
    flagged: True keeps only results with some result flag, False only results with none.
    A result flag means the test system may have limited the fitted region or the intercept;
    the exclusion reasons of single points (point flags) do not make a result flagged.
    A bias range leaves out results measured without a bias.
    """

    parts: tuple[str, ...] = ()
    lots: tuple[str, ...] = ()
    wafers: tuple[str, ...] = ()
    serials: tuple[str, ...] = ()
    tags: tuple[str, ...] = ()
    freq_min_hz: float | None = None
    freq_max_hz: float | None = None
    spacing_min_hz: float | None = None
    spacing_max_hz: float | None = None
    bias_min_v: float | None = None
    bias_max_v: float | None = None
    since: dt.datetime | None = None
    until: dt.datetime | None = None
    flags: tuple[str, ...] = ()
    flagged: bool | None = None
    verdicts: tuple[str, ...] = ()

    def check(self) -> ResultFilter:
        """Raise InputError (one line, naming the filter) for values no result could match."""
        for name, allowed in (("flags", FLAGS), ("verdicts", VERDICTS)):
            bad = [v for v in getattr(self, name) if v not in allowed]
            if bad:
                raise InputError(f"filter {name}: unknown value '{bad[0]}'; allowed: {', '.join(allowed)}")
        for low, high in (("freq_min_hz", "freq_max_hz"), ("spacing_min_hz", "spacing_max_hz"),
                          ("bias_min_v", "bias_max_v")):
            lo, hi = getattr(self, low), getattr(self, high)
            for name, value in ((low, lo), (high, hi)):
                if value is not None and not math.isfinite(value):
                    raise InputError(f"filter {name}: {value} is not a finite number")
            if lo is not None and hi is not None and lo > hi:
                raise InputError(f"filter {low}={lo:g} is above {high}={hi:g}; give min <= max")
        for name in ("since", "until"):
            value = getattr(self, name)
            if value is not None and value.tzinfo is None:
                raise InputError(f"filter {name}: {value} has no timezone; give a UTC time")
        if self.since and self.until and self.since >= self.until:
            raise InputError(f"filter since={self.since.isoformat()} is not before until={self.until.isoformat()}")
        return self

    def describe(self) -> str:
        """The filter in words, for report headings; 'all results' when empty."""
        parts = []
        for f in fields(self):
            value = getattr(self, f.name)
            if value in (None, ()):
                continue
            if isinstance(value, tuple):
                value = ", ".join(value)
            elif isinstance(value, dt.datetime):
                value = value.strftime("%Y-%m-%d %H:%M UTC")
            elif isinstance(value, float):
                value = f"{value:g}"
            parts.append(f"{f.name} {value}")
        return "; ".join(parts) or "all results"


@dataclass
class ResultRow:
    """One result with its device and run; powers in dBm, gain in dB, frequencies in Hz."""

    result_id: int
    run_guid: str
    started_at: dt.datetime
    part_number: str
    serial: str
    lot: str | None
    wafer: str | None
    position: str | None
    tags: tuple[str, ...]
    center_hz: float
    spacing_hz: float
    bias_v: float | None
    gain_db: float | None
    iip3_dbm: float | None
    iip3_lower_dbm: float | None
    iip3_upper_dbm: float | None
    oip3_dbm: float | None
    oip3_lower_dbm: float | None
    oip3_upper_dbm: float | None
    p1db_in_dbm: float | None
    iip2_dbm: float | None
    iip3_bound_db: float | None
    n_valid: int
    n_points: int
    verdict: str | None
    verdict_detail: str | None
    reason: str | None
    temperature_c: float | None = None  # chamber set point; None without a chamber
    lo_dbm: float | None = None  # LO power stepped by a mixer plan; None when not stepped
    flags: tuple[str, ...] = ()


# Exported columns (CSV, JSON): everything but the database's own row id.
# Axes added after the CSV layout was fixed (issue 15: the stepped LO): in JSON and frames always,
# in CSV only when some row has a value, so a CSV of earlier data keeps its columns.
LATER_AXIS_FIELDS = ("lo_dbm",)
EXPORT_FIELDS = tuple(f.name for f in fields(ResultRow) if f.name not in ("result_id", *LATER_AXIS_FIELDS))

_COLUMNS = (
    Result.id, Run.guid, Run.started_at, Device.part_number, Device.serial, Device.lot, Device.wafer,
    Device.position, Device.tags, Result.center_hz, Result.spacing_hz, Result.bias_v, Result.gain_db,
    Result.iip3_dbm, Result.iip3_lower_dbm, Result.iip3_upper_dbm, Result.oip3_dbm,
    Result.oip3_lower_dbm, Result.oip3_upper_dbm, Result.p1db_in_dbm, Result.iip2_dbm,
    Result.iip3_bound_db, Result.n_valid, Result.n_points, Result.verdict, Result.verdict_detail,
    Result.reason, Result.temperature_c, Result.lo_dbm,
)


def _flagged_result_ids(names: tuple[str, ...]) -> sa.Select:
    """Ids of results with a result flag (any, or one of names). Point flags are exclusion
    reasons of single points and do not count (see ResultFilter)."""
    own = sa.select(ResultFlag.result_id)
    if names:
        own = own.where(ResultFlag.flag.in_(names))
    return own


def has_any_tag(dialect: str, tags: tuple[str, ...]) -> sa.ColumnElement[bool]:
    # The tags column is a JSON array; each backend has its own function to unnest one.
    unnest = sa.func.json_each if dialect == "sqlite" else sa.func.json_array_elements_text
    each = unnest(Device.tags).table_valued("value")
    return sa.select(each.c.value).where(each.c.value.in_(tags)).exists()


def conditions(flt: ResultFilter, dialect: str) -> list[sa.ColumnElement[bool]]:
    """The WHERE clauses for a filter, over results joined to runs and devices."""
    where: list[sa.ColumnElement[bool]] = []
    for column, values in ((Device.part_number, flt.parts), (Device.lot, flt.lots),
                           (Device.wafer, flt.wafers), (Device.serial, flt.serials),
                           (Result.verdict, flt.verdicts)):
        if values:
            where.append(column.in_(values))
    if flt.tags:
        where.append(has_any_tag(dialect, flt.tags))
    for column, low, high in ((Result.center_hz, flt.freq_min_hz, flt.freq_max_hz),
                              (Result.spacing_hz, flt.spacing_min_hz, flt.spacing_max_hz),
                              (Result.bias_v, flt.bias_min_v, flt.bias_max_v)):
        if low is not None:
            where.append(column >= low)
        if high is not None:
            where.append(column <= high)
    if flt.since is not None:
        where.append(Run.started_at >= flt.since)
    if flt.until is not None:
        where.append(Run.started_at < flt.until)
    if flt.flags:
        where.append(Result.id.in_(_flagged_result_ids(flt.flags)))
    if flt.flagged is not None:
        flagged = Result.id.in_(_flagged_result_ids(()))
        where.append(flagged if flt.flagged else sa.not_(flagged))
    return where


def result_query(flt: ResultFilter, dialect: str, columns=_COLUMNS) -> sa.Select:
    return (sa.select(*columns).select_from(Result).join(Run, Run.id == Result.run_id)
            .join(Device, Device.id == Run.device_id).where(*conditions(flt, dialect)))


# The same columns for find_results, with two read raw and converted once per distinct value:
# a run's start time (8 results share it; SQLite's text is parsed by a regular expression) and a
# device's tags, as JSON text (a handful of distinct lists; PostgreSQL's driver would decode
# each row's JSON anew, about 24 ms a query for 2,700 results).
_STARTED_AT, _TAGS = _COLUMNS.index(Run.started_at), _COLUMNS.index(Device.tags)
_RAW_COLUMNS = tuple(
    sa.type_coerce(Run.started_at, sa.types.NullType()) if column is Run.started_at
    else sa.cast(Device.tags, sa.Text) if column is Device.tags else column
    for column in _COLUMNS)


@contextlib.contextmanager
def _no_collection():
    """The cyclic garbage collector paused: thousands of new rows would set off a full collection
    of every object in the process (25-70 ms at the benchmark's heap, on a 20 ms query), and they
    are new, not garbage. Left as found, so nested or concurrent callers cannot leave it off."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


def _result_rows(connection: sa.Connection, query: sa.Select) -> list[ResultRow]:
    """ResultRows from plain tuples (no ORM objects), each distinct time and tag text converted once."""
    to_time = Run.__table__.c.started_at.type.dialect_impl(connection.dialect).result_processor(connection.dialect, None)
    times: dict = {}
    tag_lists: dict[str | None, tuple[str, ...]] = {None: ()}
    rows = []
    for row in connection.execute(query).all():  # one fetch, not one driver call per row
        row = list(row)
        raw_time, raw_tags = row[_STARTED_AT], row[_TAGS]
        started_at = times.get(raw_time)
        if started_at is None:
            started_at = times[raw_time] = to_time(raw_time) if to_time else raw_time
        tags = tag_lists.get(raw_tags)
        if tags is None:
            tags = tag_lists[raw_tags] = tuple(json.loads(raw_tags) or ())
        row[_STARTED_AT], row[_TAGS] = started_at, tags
        rows.append(ResultRow(*row))
    return rows


def find_results(session: Session, flt: ResultFilter, limit: int | None = None) -> list[ResultRow]:
    """Results matching the filter, ordered by part, serial, run start, center, spacing, bias."""
    flt.check()
    if limit is not None and limit < 1:
        raise InputError(f"limit {limit}: give at least 1")
    dialect = session.get_bind().dialect.name
    order = (Device.part_number, Device.serial, Run.started_at, Run.guid, Result.center_hz,
             Result.spacing_hz, sa.nulls_first(Result.bias_v))
    query = result_query(flt, dialect, _RAW_COLUMNS).order_by(*order)
    if limit is not None:
        query = query.limit(limit)
    connection = session.connection()
    with _no_collection():
        rows = _result_rows(connection, query)
        _attach_flags(connection, rows, flt, dialect, order, limit)
    return rows


def _attach_flags(connection: sa.Connection, rows: list[ResultRow], flt: ResultFilter, dialect: str,
                  order: tuple, limit: int | None) -> None:
    """Each row's result flags, sorted."""
    if len(rows) <= _BOUND_IDS_MAX:
        ids = [row.result_id for row in rows]
    else:  # thousands of bound ids cost more than asking the filter again
        ids = result_query(flt, dialect, (Result.id,))
        ids = (ids.order_by(*order).limit(limit) if limit is not None else ids).scalar_subquery()
    flags: dict[int, set[str]] = {}
    for result_id, flag in connection.execute(
            sa.select(ResultFlag.result_id, ResultFlag.flag).where(ResultFlag.result_id.in_(ids))):
        flags.setdefault(result_id, set()).add(flag)
    for row in rows:
        row.flags = tuple(sorted(flags.get(row.result_id, ())))


def count_results(session: Session, flt: ResultFilter) -> int:
    flt.check()
    dialect = session.get_bind().dialect.name
    return session.scalar(result_query(flt, dialect, (sa.func.count(Result.id),)))


def latest_per_device(rows: list[ResultRow]) -> tuple[list[ResultRow], int]:
    """One result per device and condition (centre, spacing, bias, temperature, LO power): the one from the
    device's latest run. Returns the kept rows, in their order, and how many older ones were left out."""
    latest: dict[tuple, ResultRow] = {}
    for row in rows:
        key = (row.part_number, row.serial, row.center_hz, row.spacing_hz, row.bias_v, row.temperature_c, row.lo_dbm)
        kept = latest.get(key)
        if kept is None or (row.started_at, row.run_guid) > (kept.started_at, kept.run_guid):
            latest[key] = row
    chosen = {id(row) for row in latest.values()}
    return [row for row in rows if id(row) in chosen], len(rows) - len(latest)
