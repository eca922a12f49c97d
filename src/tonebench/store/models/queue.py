"""Tables outside any one run: the job queue and the part numbers' spec limits."""

from __future__ import annotations

import datetime as dt

import sqlalchemy as sa
from sqlalchemy.orm import Mapped, mapped_column, relationship

from tonebench.store.models.base import (
    JOB_STATUSES,
    SPEC_PARAMETERS,
    Base,
    in_list,
    utc_now,
)
from tonebench.store.models.runs import Run


class Job(Base):
    """A plan queued for a bench; a worker on that bench claims it, runs it, and links the run."""

    __tablename__ = "jobs"
    __table_args__ = (
        sa.CheckConstraint(in_list("status", JOB_STATUSES), name="status"),
        sa.Index("ix_jobs_bench_status_priority", "bench_name", "status", "priority", "id"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    guid: Mapped[str] = mapped_column(sa.String(36), unique=True)
    bench_name: Mapped[str] = mapped_column(sa.String(200))
    plan_name: Mapped[str] = mapped_column(sa.String(200))
    plan_text: Mapped[str] = mapped_column(sa.Text)
    plan_sha256: Mapped[str] = mapped_column(sa.String(64))
    plan_path: Mapped[str | None] = mapped_column(sa.Text)
    status: Mapped[str] = mapped_column(sa.String(16), default="queued")
    priority: Mapped[int] = mapped_column(default=0)
    created_at: Mapped[dt.datetime] = mapped_column(default=utc_now)
    claimed_by: Mapped[str | None] = mapped_column(sa.String(255))
    claimed_at: Mapped[dt.datetime | None]
    finished_at: Mapped[dt.datetime | None]
    run_id: Mapped[int | None] = mapped_column(sa.ForeignKey("runs.id", ondelete="SET NULL"))
    message: Mapped[str | None] = mapped_column(sa.Text)

    run: Mapped[Run | None] = relationship()


class SpecLimit(Base):
    """A datasheet-style limit for a part number: parameter within [min_value, max_value] over a
    frequency range, optionally only for some spacings, biases and chamber temperatures."""

    __tablename__ = "spec_limits"
    __table_args__ = (sa.CheckConstraint(in_list("parameter", SPEC_PARAMETERS), name="parameter"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    part_number: Mapped[str] = mapped_column(sa.String(200), index=True)
    parameter: Mapped[str] = mapped_column(sa.String(32))
    min_value: Mapped[float | None]
    max_value: Mapped[float | None]
    freq_min_hz: Mapped[float]
    freq_max_hz: Mapped[float]
    spacing_min_hz: Mapped[float | None]
    spacing_max_hz: Mapped[float | None]
    bias_min_v: Mapped[float | None]
    bias_max_v: Mapped[float | None]
    temp_min_c: Mapped[float | None]
    temp_max_c: Mapped[float | None]
    # The stated tone level (dBm per tone at the DUT input) of an IMD limit (LEVEL_PARAMETERS only).
    tone_dbm: Mapped[float | None]
    created_at: Mapped[dt.datetime] = mapped_column(default=utc_now)
    notes: Mapped[str | None] = mapped_column(sa.Text)
