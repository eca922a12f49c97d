"""Import runs from a transfer file (format: catalog/transfer.py): verified first, then every
run the database lacks added in one transaction, shared records reused by their natural keys."""

from __future__ import annotations

import datetime as dt
import functools
import gzip
import hashlib
import json
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import sqlalchemy as sa
from sqlalchemy.orm import Session, sessionmaker

from tonebench.catalog.transfer_format import (
    FORMAT,
    VERSION,
    canonical,
    travelling_columns,
)
from tonebench.errors import DatabaseError, InputError
from tonebench.store.models import (
    Bench,
    CalibrationOffset,
    CalibrationSet,
    Device,
    Event,
    Instrument,
    LevelResult,
    Offset,
    Plan,
    Point,
    PointFlag,
    Result,
    ResultFlag,
    Run,
    SystemResidual,
    UtcDateTime,
)


@dataclass
class ImportSummary:
    runs_added: int = 0
    runs_present: int = 0
    points_added: int = 0
    added: dict[str, int] = field(default_factory=dict)  # shared records added, per kind


def _lines(path: Path) -> Iterator[tuple[int, bytes]]:
    try:
        with gzip.open(path, "rb") as f:
            for number, line in enumerate(f, start=1):
                yield number, line
    except (OSError, EOFError) as exc:
        raise InputError(f"import file {path}: not a readable transfer file ({exc})") from None


def _parse(path: Path, number: int, line: bytes) -> dict:
    try:
        record = json.loads(line)
    except ValueError as exc:
        raise InputError(f"import file {path} line {number}: not JSON ({exc})") from None
    if not isinstance(record, dict) or "kind" not in record:
        raise InputError(f"import file {path} line {number}: a record needs a 'kind'")
    return record


def verify(path: Path) -> int:
    """Check format, version and content hash; returns the number of records. Writes nothing."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"import file {path}: no such file")
    digest = hashlib.sha256()
    count = 0
    end = None
    for number, line in _lines(path):
        if end is not None:
            raise InputError(f"import file {path} line {number}: data after the end record")
        if count == 0:
            header = _parse(path, number, line)
            if header.get("kind") != "header" or header.get("format") != FORMAT:
                raise InputError(f"import file {path}: not a tonebench transfer file (no '{FORMAT}' header)")
            if not isinstance(header.get("version"), int) or header["version"] > VERSION:
                raise InputError(f"import file {path}: format version {header.get('version')} is newer than "
                                 f"this tonebench reads ({VERSION}); upgrade tonebench")
        if line.startswith(b'{"kind":"end"'):
            end = _parse(path, number, line)
            continue
        digest.update(line)
        count += 1
    if end is None:
        raise InputError(f"import file {path}: no end record; the file is cut short")
    if end.get("records") != count or end.get("sha256") != digest.hexdigest():
        raise InputError(f"import file {path}: content hash or record count does not match; "
                         "the file is damaged or was edited")
    return count


def _load(model, record: dict, path: Path, what: str, extra: Iterable[str] = ()) -> dict:
    """Column values of one record, times parsed; unknown fields, missing required ones and values
    of the wrong type are refused, naming `what` (the record, with its line) and the field."""
    if not isinstance(record, dict):
        raise InputError(f"import file {path}: {what} is {type(record).__name__}, not a record")
    columns = {c.name: c for c in travelling_columns(model)}
    unknown = set(record) - set(columns) - {"kind", *extra}
    if unknown:
        raise InputError(f"import file {path}: {what} has unknown field '{sorted(unknown)[0]}'; "
                         "was it written by a newer tonebench?")
    values = {}
    for name, column in columns.items():
        if name not in record:
            if _required(column):
                raise InputError(f"import file {path}: {what}: field '{name}' is missing; nothing was imported")
            continue
        value = record[name]
        problem = _type_problem(column, value)
        if problem:
            raise InputError(f"import file {path}: {what}: field '{name}' {problem} (got {value!r:.60}); "
                             "nothing was imported")
        if value is None and isinstance(column.type, sa.JSON):
            continue  # left unset it is SQL NULL; None given would be stored as JSON 'null'
        if value is not None and isinstance(column.type, UtcDateTime):
            value = dt.datetime.fromisoformat(value)
        values[column.key] = value
    return values


def _required(column: sa.Column) -> bool:
    return not column.nullable and column.default is None and column.server_default is None


def _type_problem(column: sa.Column, value) -> str | None:
    """Why `value` cannot go into `column`, or None (JSON columns take any JSON value)."""
    kind = column.type
    if value is None:
        return None if column.nullable or column.default is not None else "must not be null"
    if isinstance(kind, UtcDateTime):
        if not isinstance(value, str):
            return "must be an ISO 8601 time"
        try:
            parsed = dt.datetime.fromisoformat(value)
        except ValueError:
            return "must be an ISO 8601 time"
        return None if parsed.tzinfo is not None else "must be a time with its zone (UTC)"
    if isinstance(kind, sa.Boolean):
        return None if isinstance(value, bool) else "must be true or false"
    if isinstance(kind, sa.Integer):
        return None if isinstance(value, int) and not isinstance(value, bool) else "must be a whole number"
    if isinstance(kind, (sa.Float, sa.Numeric)):
        return None if isinstance(value, (int, float)) and not isinstance(value, bool) else "must be a number"
    if isinstance(kind, sa.String) and not isinstance(value, str):
        return "must be text"
    return None


@functools.cache
def _unique_keys(model) -> list[tuple[str, ...]]:
    """The model's unique column groups without their foreign keys: what must not repeat among
    the records of one list (points of one run) or of one file (runs by GUID)."""
    table = model.__table__
    groups = [tuple(c.name for c in con.columns) for con in table.constraints if isinstance(con, sa.UniqueConstraint)]
    groups += [tuple(c.name for c in index.columns) for index in table.indexes if index.unique]
    groups += [(c.name,) for c in table.columns if c.unique]
    foreign = {c.name for c in table.columns if c.foreign_keys}
    return sorted({tuple(n for n in group if n not in foreign) for group in groups} - {()})


class _Uniques:
    """Remembers the unique keys seen (with where each was seen) to refuse duplicates in one line."""

    def __init__(self, path: Path):
        self.path = path
        self.seen: dict[tuple, str] = {}

    def check(self, model, record: dict, what: str) -> None:
        for group in _unique_keys(model):
            key = (model.__name__, group, tuple(canonical(record.get(name)) for name in group))
            if key in self.seen:
                fields = "', '".join(group)
                raise InputError(f"import file {self.path}: {what}: field '{fields}' repeats {self.seen[key]} "
                                 f"({', '.join(str(record.get(n)) for n in group)}); nothing was imported")
            self.seen[key] = what


def _list_field(record: dict, name: str, path: Path, what: str) -> list:
    value = record.get(name)
    if name not in record:
        raise InputError(f"import file {path}: {what}: field '{name}' is missing; nothing was imported")
    if not isinstance(value, list):
        raise InputError(f"import file {path}: {what}: field '{name}' must be a list (got {value!r:.60}); "
                         "nothing was imported")
    return value


def _key_field(record: dict, name: str, path: Path, what: str, *, pair: bool = False, optional: bool = True):
    """A reference to a shared record: text (a pair of texts for a device), or null where allowed."""
    if name not in record:
        raise InputError(f"import file {path}: {what}: field '{name}' is missing; nothing was imported")
    value = record[name]
    if value is None and optional:
        return None
    ok = (isinstance(value, list) and len(value) == 2 and all(isinstance(v, str) for v in value)) if pair \
        else isinstance(value, str)
    if not ok:
        shape = "[part number, serial]" if pair else "text"
        raise InputError(f"import file {path}: {what}: field '{name}' must be {shape} (got {value!r:.60}); "
                         "nothing was imported")
    return value


class _Importer:
    """Maps natural keys to ids in the target database, adding shared records it lacks."""

    def __init__(self, session: Session, path: Path, summary: ImportSummary):
        self.session, self.path, self.summary = session, path, summary
        self.benches: dict[str, int] = {}
        self.plans: dict[str, int] = {}
        self.devices: dict[tuple[str, str], int] = {}
        self.sets: dict[str, int] = {}
        self.uniques = _Uniques(path)

    def _get_or_add(self, model, lookup: dict, values: dict, kind: str) -> int:
        found = self.session.scalar(sa.select(model.id).filter_by(**lookup))
        if found is not None:
            return found
        row = model(**values)
        self.session.add(row)
        self.session.flush()
        self.summary.added[kind] = self.summary.added.get(kind, 0) + 1
        return row.id

    def _need(self, table: dict, key, kind: str, what: str):
        if key is None:
            return None
        key = tuple(key) if isinstance(key, list) else key
        if key not in table:
            raise InputError(f"import file {self.path}: {what} refers to {kind} {key!r}, which the file does not hold")
        return table[key]

    def _rows(self, model, record: dict, name: str, what: str, extra: Iterable[str] = ()) -> list[tuple[dict, dict, str]]:
        """The checked items of one list field: (item, column values, where), duplicates refused."""
        rows = []
        seen = _Uniques(self.path)  # within this list only: memory stays one run's worth
        for index, item in enumerate(_list_field(record, name, self.path, what)):
            where = f"{what} {name}[{index}]"
            values = _load(model, item, self.path, where, extra)
            seen.check(model, item, where)
            rows.append((item, values, where))
        return rows

    def add(self, record: dict, number: int) -> None:
        kind = record["kind"]
        what = f"line {number} ({kind} record)"
        if kind == "bench":
            values = _load(Bench, record, self.path, what)
            self.uniques.check(Bench, record, what)
            self.benches[values["name"]] = self._get_or_add(Bench, {"name": values["name"]}, values, kind)
        elif kind == "plan":
            values = _load(Plan, record, self.path, what)
            self.uniques.check(Plan, record, what)
            self.plans[values["sha256"]] = self._get_or_add(Plan, {"sha256": values["sha256"]}, values, kind)
        elif kind == "device":
            values = _load(Device, record, self.path, what)
            self.uniques.check(Device, record, what)
            key = (values["part_number"], values["serial"])
            self.devices[key] = self._get_or_add(Device, {"part_number": key[0], "serial": key[1]}, values, kind)
        elif kind == "calibration_set":
            self._add_calibration_set(record, what)
        elif kind == "run":
            self._add_run(record, what)
        elif kind != "header":
            raise InputError(f"import file {self.path}: {what}: unknown record kind '{kind}'")

    def _add_calibration_set(self, record: dict, what: str) -> None:
        values = _load(CalibrationSet, record, self.path, what, ("bench", "offsets", "residuals"))
        self.uniques.check(CalibrationSet, record, what)
        bench = _key_field(record, "bench", self.path, what)
        offsets = self._rows(CalibrationOffset, record, "offsets", what)
        residuals = self._rows(SystemResidual, record, "residuals", what)
        existing = self.session.scalars(sa.select(CalibrationSet).where(CalibrationSet.name == values["name"])).first()
        if existing is not None:
            if not _same_set(existing, values, [v for _, v, _ in offsets]):
                raise InputError(f"import file {self.path}: {what}: calibration set '{values['name']}' differs from "
                                 "the one of that name in the database (method, creation time or offsets)")
            self.sets[values["name"]] = existing.id
            return
        cal = CalibrationSet(**values, bench_id=self._need(self.benches, bench, "bench", what))
        cal.offsets = [CalibrationOffset(**v) for _, v, _ in offsets]
        cal.residuals = [SystemResidual(**v) for _, v, _ in residuals]
        self.session.add(cal)
        self.session.flush()
        self.sets[values["name"]] = cal.id
        self.summary.added["calibration_set"] = self.summary.added.get("calibration_set", 0) + 1

    def _add_run(self, record: dict, what: str) -> None:
        path = self.path
        values = _load(Run, record, path, what, ("bench", "plan", "device", "calibration_set", "instruments",
                                                 "offsets", "events", "points", "results"))
        self.uniques.check(Run, record, what)
        refs = {
            "bench_id": self._need(self.benches, _key_field(record, "bench", path, what, optional=False), "bench", what),
            "plan_id": self._need(self.plans, _key_field(record, "plan", path, what, optional=False), "plan", what),
            "device_id": self._need(self.devices, _key_field(record, "device", path, what, pair=True), "device", what),
            "calibration_set_id": self._need(self.sets, _key_field(record, "calibration_set", path, what),
                                             "calibration set", what),
        }
        points = [Point(**v, flags=[PointFlag(**fv) for _, fv, _ in self._rows(PointFlag, p, "flags", where)])
                  for p, v, where in self._rows(Point, record, "points", what, ("flags",))]
        points_by_key = {point.point_key: point for point in points}
        children = {
            "instruments": [Instrument(**v) for _, v, _ in self._rows(Instrument, record, "instruments", what)],
            "offsets": [Offset(**v) for _, v, _ in self._rows(Offset, record, "offsets", what)],
            "events": [Event(**v) for _, v, _ in self._rows(Event, record, "events", what)],
            "points": points,
            "results": [Result(**v, calibration_set_id=self._need(
                                   self.sets, _key_field(r, "calibration_set", path, where), "calibration set", where),
                               flags=[ResultFlag(**fv) for _, fv, _ in self._rows(ResultFlag, r, "flags", where)],
                               levels=self._levels(r, points_by_key, where))
                        for r, v, where in self._rows(Result, record, "results", what,
                                                      ("flags", "calibration_set", "levels"))],
        }
        # Checked in full before this: a run already present is skipped, a damaged one refused.
        if self.session.scalar(sa.select(Run.id).where(Run.guid == values["guid"])) is not None:
            self.summary.runs_present += 1
            return
        run = Run(**values, **refs)
        for name, rows in children.items():
            setattr(run, name, rows)
        self.session.add(run)
        self.session.flush()
        self.summary.runs_added += 1
        self.summary.points_added += len(run.points)
        self.session.expunge_all()  # one run in memory at a time


    def _levels(self, result: dict, points_by_key: dict, what: str) -> list[LevelResult]:
        """A result's per-level rows (a field only results with rows have), each on the run's
        point of its point_key."""
        if "levels" not in result:
            return []
        levels = []
        for item, values, where in self._rows(LevelResult, result, "levels", what, ("point_key",)):
            point = points_by_key.get(item.get("point_key"))
            if point is None:
                raise InputError(f"import file {self.path}: {where}: point_key {item.get('point_key')!r:.60} names "
                                 "no point of this run; nothing was imported")
            levels.append(LevelResult(**values, point=point))
        return levels


def _same_set(existing: CalibrationSet, values: dict, offsets: list[dict]) -> bool:
    """A set of this name already in the database is the file's set. Bench-file sets stand for
    the content of an [offsets] table (their name carries its hash), so two databases that ran
    the same bench file hold the same set made at different times: compared by their offsets.
    Other sets are one measurement or import each: method and creation time."""
    if existing.method != values["method"]:
        return False
    if values["method"] != "bench-file":
        return existing.created_at == values.get("created_at")
    def rows(items):
        return sorted((o["path"], float(o["freq_hz"]), float(o["loss_db"])) for o in items)
    return rows(offsets) == rows({"path": o.path, "freq_hz": o.freq_hz, "loss_db": o.loss_db} for o in existing.offsets)


def import_runs(sessions: sessionmaker, path: Path) -> ImportSummary:
    """Add the file's runs that the database lacks (by GUID), all in one transaction."""
    path = Path(path)
    verify(path)
    summary = ImportSummary()
    try:
        with sessions.begin() as session:
            importer = _Importer(session, path, summary)
            for number, line in _lines(path):
                record = _parse(path, number, line)
                if record["kind"] == "end":
                    break
                importer.add(record, number)
    except sa.exc.IntegrityError as exc:
        # Every record was checked (fields, types, duplicates) before it was added, so this is
        # the database refusing a row that clashes with one it holds, or one added meanwhile.
        reason = " ".join(str(exc.orig).split())[:200]
        raise DatabaseError(f"import of {path}: the database refused a row ({reason}); nothing was imported; "
                            "if another import ran at the same time, run this one again") from None
    return summary
