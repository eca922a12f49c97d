"""Tables of one run: the bench, device and plan it used, the run itself, its instruments, path
losses and event log."""

from __future__ import annotations

import datetime as dt
from typing import Any

import sqlalchemy as sa
from sqlalchemy.orm import Mapped, mapped_column, relationship

from tonebench.store.models.base import (
    EVENT_LEVELS,
    OFFSET_PATHS,
    RUN_STATUSES,
    Base,
    in_list,
    run_fk,
    utc_now,
)


class Bench(Base):
    __tablename__ = "benches"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(sa.String(200), unique=True)
    description: Mapped[str | None] = mapped_column(sa.Text)
    created_at: Mapped[dt.datetime] = mapped_column(default=utc_now)

    runs: Mapped[list[Run]] = relationship(back_populates="bench")


class Device(Base):
    __tablename__ = "devices"
    __table_args__ = (sa.UniqueConstraint("part_number", "serial"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    part_number: Mapped[str] = mapped_column(sa.String(200))
    serial: Mapped[str] = mapped_column(sa.String(200), index=True)  # queries by serial alone
    lot: Mapped[str | None] = mapped_column(sa.String(200), index=True)
    wafer: Mapped[str | None] = mapped_column(sa.String(200), index=True)
    position: Mapped[str | None] = mapped_column(sa.String(200))
    tags: Mapped[list[str]] = mapped_column(default=list)
    notes: Mapped[str | None] = mapped_column(sa.Text)

    runs: Mapped[list[Run]] = relationship(back_populates="device")


class Plan(Base):
    """A plan file exactly as given; identical texts share one row (sha256 of the UTF-8 text)."""

    __tablename__ = "plans"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(sa.String(200))
    text: Mapped[str] = mapped_column(sa.Text)
    sha256: Mapped[str] = mapped_column(sa.String(64), unique=True)
    created_at: Mapped[dt.datetime] = mapped_column(default=utc_now)

    runs: Mapped[list[Run]] = relationship(back_populates="plan")


class Run(Base):
    # Point, Result and CalibrationSet are defined in modules that import this one; the mapper
    # finds them by name once the package is imported.
    __tablename__ = "runs"
    __table_args__ = (sa.CheckConstraint(in_list("status", RUN_STATUSES), name="status"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    guid: Mapped[str] = mapped_column(sa.String(36), unique=True)
    bench_id: Mapped[int] = mapped_column(sa.ForeignKey("benches.id"))
    device_id: Mapped[int | None] = mapped_column(sa.ForeignKey("devices.id"), index=True)
    plan_id: Mapped[int] = mapped_column(sa.ForeignKey("plans.id"))
    calibration_set_id: Mapped[int | None] = mapped_column(sa.ForeignKey("calibration_sets.id"))
    status: Mapped[str] = mapped_column(sa.String(16))
    end_reason: Mapped[str | None] = mapped_column(sa.Text)
    started_at: Mapped[dt.datetime] = mapped_column(default=utc_now, index=True)
    # Which process drives the run ("host:pid") and when it last showed progress: a 'running'
    # run whose owner stopped beating is a dead run that can be resumed.
    owner: Mapped[str | None] = mapped_column(sa.String(255))
    heartbeat_at: Mapped[dt.datetime | None]
    ended_at: Mapped[dt.datetime | None]
    simulated: Mapped[bool]
    host: Mapped[str] = mapped_column(sa.String(255))
    software_version: Mapped[str] = mapped_column(sa.String(64))
    metadata_json: Mapped[dict[str, Any]] = mapped_column(default=dict)

    bench: Mapped[Bench] = relationship(back_populates="runs")
    device: Mapped[Device | None] = relationship(back_populates="runs")
    plan: Mapped[Plan] = relationship(back_populates="runs")
    calibration_set: Mapped[CalibrationSet | None] = relationship()  # noqa: F821
    # Children go with their run; passive_deletes lets the database's ON DELETE CASCADE do it.
    instruments: Mapped[list[Instrument]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True
    )
    offsets: Mapped[list[Offset]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True
    )
    points: Mapped[list[Point]] = relationship(  # noqa: F821
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True,
        order_by="Point.seq",
    )
    results: Mapped[list[Result]] = relationship(  # noqa: F821
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True
    )
    events: Mapped[list[Event]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True,
        order_by="Event.at",
    )


class Instrument(Base):
    """One instrument as it answered at the start of a run (role such as source1, analyzer)."""

    __tablename__ = "instruments"
    __table_args__ = (sa.UniqueConstraint("run_id", "role"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(run_fk())
    role: Mapped[str] = mapped_column(sa.String(32))
    resource: Mapped[str] = mapped_column(sa.String(255))
    dialect: Mapped[str] = mapped_column(sa.String(100))
    idn: Mapped[str] = mapped_column(sa.Text)

    run: Mapped[Run] = relationship(back_populates="instruments")


class Offset(Base):
    """Path loss used by a run at one frequency; origin says where the number came from."""

    __tablename__ = "offsets"
    __table_args__ = (
        sa.CheckConstraint(in_list("path", OFFSET_PATHS), name="path"),
        sa.Index("ix_offsets_run_path_freq", "run_id", "path", "freq_hz"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(run_fk())
    path: Mapped[str] = mapped_column(sa.String(8))
    freq_hz: Mapped[float]
    loss_db: Mapped[float]
    origin: Mapped[str] = mapped_column(sa.Text)

    run: Mapped[Run] = relationship(back_populates="offsets")


class Event(Base):
    """Something worth a line in the run log (pause, leveling retry, overload, error)."""

    __tablename__ = "events"
    __table_args__ = (sa.CheckConstraint(in_list("level", EVENT_LEVELS), name="level"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int | None] = mapped_column(run_fk(), index=True)
    at: Mapped[dt.datetime] = mapped_column(default=utc_now)
    level: Mapped[str] = mapped_column(sa.String(16))
    kind: Mapped[str] = mapped_column(sa.String(64))
    message: Mapped[str] = mapped_column(sa.Text)
    details_json: Mapped[dict[str, Any]] = mapped_column(default=dict)

    run: Mapped[Run | None] = relationship(back_populates="events")

