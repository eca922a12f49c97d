"""The device registry: part number and serial (unique together), lot, wafer, position, tags, notes.

Runs create their device from the plan's [device] table when it is not registered yet; devices
can also be registered ahead of measuring them.
"""

from __future__ import annotations

from dataclasses import dataclass

import sqlalchemy as sa
from sqlalchemy.orm import Session

from tonebench.catalog.query import has_any_tag
from tonebench.config.plan_file import control_character_problem
from tonebench.errors import InputError
from tonebench.store.models import Device, Run


def _clean(field: str, value: str | None, *, required: bool = False) -> str | None:
    value = None if value is None else value.strip()
    if required and not value:
        raise InputError(f"device {field}: empty; give a non-empty {field.replace('_', ' ')}")
    problem = None if value is None else control_character_problem(value, multiline=field == "notes")
    if problem:
        raise InputError(f"device {field} {value!r}: {problem}")
    return value or None


def clean_tags(tags) -> list[str]:
    """Tags stripped, without duplicates, in sorted order; an empty tag is refused."""
    cleaned = set()
    for tag in tags:
        tag = tag.strip()
        if not tag:
            raise InputError("device tags: an empty tag; give words like 'lna' or 'qual'")
        problem = control_character_problem(tag)
        if problem:
            raise InputError(f"device tag {tag!r}: {problem}")
        cleaned.add(tag)
    return sorted(cleaned)


def add_device(session: Session, part_number: str, serial: str, *, lot: str | None = None,
               wafer: str | None = None, position: str | None = None, tags=(), notes: str | None = None) -> Device:
    """Register a device; refuses one whose part number and serial are already registered."""
    part_number = _clean("part_number", part_number, required=True)
    serial = _clean("serial", serial, required=True)
    if find_device(session, part_number, serial) is not None:
        raise InputError(f"device {part_number} serial {serial}: already registered (see `tonebench device show`)")
    device = Device(part_number=part_number, serial=serial, lot=_clean("lot", lot), wafer=_clean("wafer", wafer),
                    position=_clean("position", position), tags=clean_tags(tags), notes=_clean("notes", notes))
    session.add(device)
    session.flush()
    return device


def edit_device(session: Session, part_number: str, serial: str, **changes) -> tuple[Device, list[str]]:
    """Change a registered device's lot, wafer, position, tags or notes (None leaves a field as it
    is, "" clears it); returns the device and a line per field changed."""
    device = get_device(session, part_number, serial)
    said = []
    for name, value in changes.items():
        if value is None:
            continue
        new = clean_tags(value) if name == "tags" else _clean(name, value)
        if new != getattr(device, name):
            said.append(f"{name}: {getattr(device, name) or '-'} -> {(', '.join(new) if name == 'tags' else new) or '-'}")
            setattr(device, name, new)
    session.flush()
    return device, said


def find_device(session: Session, part_number: str, serial: str) -> Device | None:
    return session.scalars(sa.select(Device).where(Device.part_number == part_number, Device.serial == serial)).first()


def get_device(session: Session, part_number: str, serial: str) -> Device:
    device = find_device(session, part_number.strip(), serial.strip())
    if device is None:
        raise InputError(f"device {part_number} serial {serial}: not registered (see `tonebench device list`)")
    return device


@dataclass
class DeviceSummary:
    device: Device
    n_runs: int


def list_devices(session: Session, *, part_number: str | None = None, lot: str | None = None,
                 wafer: str | None = None, tag: str | None = None, limit: int | None = None) -> list[DeviceSummary]:
    """Registered devices with their number of runs, ordered by part number and serial."""
    runs = sa.select(Run.device_id, sa.func.count(Run.id).label("n")).group_by(Run.device_id).subquery()
    query = (sa.select(Device, sa.func.coalesce(runs.c.n, 0)).outerjoin(runs, runs.c.device_id == Device.id)
             .order_by(Device.part_number, Device.serial))
    for column, value in ((Device.part_number, part_number), (Device.lot, lot), (Device.wafer, wafer)):
        if value:
            query = query.where(column == value)
    if tag:
        query = query.where(has_any_tag(session.get_bind().dialect.name, (tag,)))
    if limit is not None:
        query = query.limit(limit)
    return [DeviceSummary(device, n) for device, n in session.execute(query)]


def device_runs(session: Session, device: Device) -> list[Run]:
    return list(session.scalars(sa.select(Run).where(Run.device_id == device.id).order_by(Run.started_at)))
