"""Export runs to a transfer file (format: catalog/transfer.py)."""

from __future__ import annotations

import datetime as dt
import gzip
import hashlib
import os
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import sqlalchemy as sa
from sqlalchemy.orm import Session, selectinload

from tonebench.catalog.transfer_format import (
    FORMAT,
    VERSION,
    canonical,
    dump_record,
    sorted_records,
)
from tonebench.errors import InputError
from tonebench.store.database import schema_head
from tonebench.store.lookups import find_run
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
)


@dataclass
class ExportSummary:
    path: Path
    runs: int = 0
    points: int = 0
    sha256: str = ""


def _run_ids(session: Session, run_idents: list[str] | None, since: dt.datetime | None) -> list[int]:
    query = sa.select(Run.id).order_by(Run.started_at, Run.guid)
    if run_idents:
        query = query.where(Run.id.in_([find_run(session, ident).id for ident in run_idents]))
    if since is not None:
        if since.tzinfo is None:
            raise InputError(f"export since {since}: no timezone; give a UTC time")
        query = query.where(Run.started_at >= since)
    return list(session.scalars(query))


def _shared_records(session: Session, run_ids: list[int]) -> Iterator[dict]:
    if not run_ids:
        return
    chosen = Run.id.in_(run_ids)
    set_ids = set(session.scalars(sa.select(Run.calibration_set_id).where(chosen, Run.calibration_set_id.is_not(None))))
    set_ids |= set(session.scalars(sa.select(Result.calibration_set_id)
                                   .where(Result.run_id.in_(run_ids), Result.calibration_set_id.is_not(None))))
    sets = list(session.scalars(sa.select(CalibrationSet).where(CalibrationSet.id.in_(set_ids))
                                .options(selectinload(CalibrationSet.offsets), selectinload(CalibrationSet.residuals))))
    bench_ids = set(session.scalars(sa.select(Run.bench_id).where(chosen))) | {s.bench_id for s in sets if s.bench_id}
    for bench in session.scalars(sa.select(Bench).where(Bench.id.in_(bench_ids)).order_by(Bench.name)):
        yield {"kind": "bench", **dump_record(bench, Bench)}
    plans = sa.select(Plan).where(Plan.id.in_(sa.select(Run.plan_id).where(chosen))).order_by(Plan.sha256)
    for plan in session.scalars(plans):
        yield {"kind": "plan", **dump_record(plan, Plan)}
    devices = (sa.select(Device).where(Device.id.in_(sa.select(Run.device_id).where(chosen)))
               .order_by(Device.part_number, Device.serial))
    for device in session.scalars(devices):
        yield {"kind": "device", **dump_record(device, Device)}
    for cal in sorted(sets, key=lambda s: s.name):
        yield {
            "kind": "calibration_set", **dump_record(cal, CalibrationSet),
            "bench": session.get(Bench, cal.bench_id).name if cal.bench_id is not None else None,
            "offsets": sorted_records((dump_record(o, CalibrationOffset) for o in cal.offsets), "path", "freq_hz"),
            "residuals": sorted_records((dump_record(r, SystemResidual) for r in cal.residuals), "center_hz", "spacing_hz"),
        }


def _run_record(session: Session, run_id: int) -> dict:
    run = session.scalars(sa.select(Run).where(Run.id == run_id).options(
        selectinload(Run.instruments), selectinload(Run.offsets), selectinload(Run.events),
        selectinload(Run.points).selectinload(Point.flags), selectinload(Run.results).selectinload(Result.flags),
        selectinload(Run.results).selectinload(Result.levels).selectinload(LevelResult.point),
        selectinload(Run.bench), selectinload(Run.plan), selectinload(Run.device),
        selectinload(Run.calibration_set))).one()
    set_names = {}
    if any(r.calibration_set_id for r in run.results):
        ids = {r.calibration_set_id for r in run.results if r.calibration_set_id}
        set_names = dict(session.execute(sa.select(CalibrationSet.id, CalibrationSet.name).where(CalibrationSet.id.in_(ids))).all())
    return {
        "kind": "run", **dump_record(run, Run),
        "bench": run.bench.name,
        "plan": run.plan.sha256,
        "device": [run.device.part_number, run.device.serial] if run.device else None,
        "calibration_set": run.calibration_set.name if run.calibration_set else None,
        "instruments": sorted_records((dump_record(i, Instrument) for i in run.instruments), "role"),
        "offsets": sorted_records((dump_record(o, Offset) for o in run.offsets), "path", "freq_hz"),
        "events": sorted_records((dump_record(e, Event) for e in run.events), "at"),
        "points": sorted_records(({**dump_record(p, Point), "flags": sorted_records(dump_record(f, PointFlag) for f in p.flags)}
                           for p in run.points), "seq", "point_key"),
        "results": sorted_records(({**dump_record(r, Result), "calibration_set": set_names.get(r.calibration_set_id),
                             "flags": sorted_records(dump_record(f, ResultFlag) for f in r.flags), **_levels(r)}
                            for r in run.results), "group_key"),
    }


def _levels(result: Result) -> dict:
    """A result's per-level rows, each naming its point by key; no field at all without rows, so
    files of runs without them read as before."""
    if not result.levels:
        return {}
    return {"levels": sorted_records(({**dump_record(level, LevelResult), "point_key": level.point.point_key}
                                      for level in result.levels), "tone_dbm", "point_key")}


def export_runs(session: Session, path: Path, run_idents: list[str] | None = None,
                since: dt.datetime | None = None) -> ExportSummary:
    """Write the chosen runs (GUIDs or unique prefixes; all when None) started at or after `since`.

    The file appears complete or not at all (written to a temporary file, then renamed).
    """
    path = Path(path)
    if not path.parent.is_dir():
        raise InputError(f"export file {path}: directory {path.parent} does not exist")
    run_ids = _run_ids(session, run_idents, since)
    summary = ExportSummary(path)
    digest = hashlib.sha256()
    fd, tmp_name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        os.fchmod(fd, 0o644)
        with os.fdopen(fd, "wb") as raw, gzip.GzipFile(fileobj=raw, mode="wb", filename="", mtime=0) as out:
            def write(record: dict) -> None:
                line = (canonical(record) + "\n").encode("utf-8")
                digest.update(line)
                out.write(line)

            write({"kind": "header", "format": FORMAT, "version": VERSION, "schema": schema_head()})
            records = 1
            for record in _shared_records(session, run_ids):
                write(record)
                records += 1
            for run_id in run_ids:
                record = _run_record(session, run_id)
                write(record)
                records += 1
                summary.runs += 1
                summary.points += len(record["points"])
                session.expunge_all()  # keep memory to one run at a time
            summary.sha256 = digest.hexdigest()
            out.write((canonical({"kind": "end", "records": records, "sha256": summary.sha256}) + "\n").encode())
        os.replace(tmp_name, path)
    except BaseException:
        Path(tmp_name).unlink(missing_ok=True)
        raise
    return summary
