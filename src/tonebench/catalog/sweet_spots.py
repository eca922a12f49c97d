"""Querying sweet-spot findings (`tonebench find --sweet-spots`): one row per stored finding of a
study (predicted from DC or measured two-tone), with its device, temperature and (measured
findings) spec verdict, filtered by the device fields the result queries take, the chamber
temperature and the verdict (which keeps only measured findings: predictions are not judged)."""

from __future__ import annotations

from sqlalchemy import select
from sqlalchemy.orm import Session

from tonebench.catalog.query import ResultFilter
from tonebench.store.bias_store import FINDING_FIELDS
from tonebench.store.models import BiasFinding, BiasStudy, Device
from tonebench.units import KELVIN_AT_0C


_STUDY_FIELDS = ("study", "series", "part_number", "serial", "lot", "wafer", "created_at", "temperature_c",
                 "chamber_read_c", "center_hz", "drain_v")
_FINDING_COLUMNS = (*FINDING_FIELDS, "input_offset_db", "verdict", "verdict_detail")
SWEET_SPOT_FIELDS = (*_STUDY_FIELDS, *_FINDING_COLUMNS)


def find_sweet_spots(session: Session, flt: ResultFilter, temp_min_c: float | None = None,
                     temp_max_c: float | None = None, limit: int | None = None) -> list[dict]:
    """Findings, newest study first (predicted before measured within a study)."""
    query = select(BiasFinding, BiasStudy, Device).join(BiasStudy, BiasFinding.study_id == BiasStudy.id).join(
        Device, BiasStudy.device_id == Device.id)
    for column, wanted in ((Device.part_number, flt.parts), (Device.lot, flt.lots), (Device.wafer, flt.wafers),
                           (Device.serial, flt.serials)):
        if wanted:
            query = query.where(column.in_(wanted))
    if flt.since is not None:
        query = query.where(BiasStudy.created_at >= flt.since)
    if flt.until is not None:
        query = query.where(BiasStudy.created_at < flt.until)
    if temp_min_c is not None:
        query = query.where(BiasStudy.temperature_c >= temp_min_c)
    if temp_max_c is not None:
        query = query.where(BiasStudy.temperature_c <= temp_max_c)
    if flt.verdicts:
        query = query.where(BiasFinding.verdict.in_(flt.verdicts))
    query = query.order_by(BiasStudy.created_at.desc(), BiasStudy.id.desc(), BiasFinding.kind)
    if limit is not None:
        query = query.limit(limit)
    rows = []
    for finding, study, device in session.execute(query):
        rows.append({
            "study": study.guid, "series": study.series_guid, "part_number": device.part_number,
            "serial": device.serial, "lot": device.lot, "wafer": device.wafer, "created_at": study.created_at,
            "temperature_c": study.temperature_c,
            "chamber_read_c": None if study.temp_k is None else study.temp_k - KELVIN_AT_0C,
            "center_hz": study.center_hz, "drain_v": study.drain_v, **{name: getattr(finding, name) for name in _FINDING_COLUMNS},
        })
    return rows
