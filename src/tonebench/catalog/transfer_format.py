"""The transfer file's format, shared by export and import (catalog/transfer.py describes it):
which columns travel, how a record is written (canonical JSON: sorted keys, no spaces) and the
content-only order of every list, so the same runs always give the same bytes."""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterable

import sqlalchemy as sa

FORMAT = "tonebench-transfer"
VERSION = 1


def travelling_columns(model) -> list[sa.Column]:
    """Columns that travel: all but the row id and foreign keys (those become natural keys)."""
    return [c for c in model.__table__.columns if c.name != "id" and not c.foreign_keys]


def dump_record(obj, model) -> dict:
    record = {}
    for column in travelling_columns(model):
        value = getattr(obj, column.key)
        if value is None and column.info.get("transfer_omit_null"):
            continue  # a later axis column: unset it is left out, so older runs keep their bytes
        record[column.name] = value.isoformat() if isinstance(value, dt.datetime) else value
    return record


def canonical(record) -> str:
    return json.dumps(record, sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def sorted_records(records: Iterable[dict], *first: str) -> list[dict]:
    """Ordered by the named fields, then by the whole record, so ids never decide the order."""
    return sorted(records, key=lambda r: (tuple(canonical(r.get(name)) for name in first), canonical(r)))
