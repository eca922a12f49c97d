"""Calibration sets: path losses with their provenance, and the test system's residual IM3."""

from __future__ import annotations

import datetime as dt
from typing import Any

import sqlalchemy as sa
from sqlalchemy.orm import Mapped, mapped_column, relationship

from tonebench.store.models.base import (
    CALIBRATION_METHODS,
    OFFSET_PATHS,
    Base,
    in_list,
    utc_now,
)


class CalibrationSet(Base):
    """Path losses with their provenance: how, when, by whom and with what they were found."""

    __tablename__ = "calibration_sets"
    __table_args__ = (sa.CheckConstraint(in_list("method", CALIBRATION_METHODS), name="method"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(sa.String(200), unique=True)
    method: Mapped[str] = mapped_column(sa.String(16))
    created_at: Mapped[dt.datetime] = mapped_column(default=utc_now)
    operator: Mapped[str | None] = mapped_column(sa.String(200))
    bench_id: Mapped[int | None] = mapped_column(sa.ForeignKey("benches.id"))
    instruments_json: Mapped[list[Any]] = mapped_column(sa.JSON, default=list)  # [{role, resource, idn}]
    source_files_json: Mapped[list[Any]] = mapped_column(sa.JSON, default=list)  # [{path, sha256}]
    freq_min_hz: Mapped[float]
    freq_max_hz: Mapped[float]
    valid_days: Mapped[float]
    expired_at: Mapped[dt.datetime | None]
    notes: Mapped[str | None] = mapped_column(sa.Text)

    offsets: Mapped[list[CalibrationOffset]] = relationship(
        back_populates="calibration_set", cascade="all, delete-orphan", passive_deletes=True,
        order_by="(CalibrationOffset.path, CalibrationOffset.freq_hz)",
    )
    residuals: Mapped[list[SystemResidual]] = relationship(
        back_populates="calibration_set", cascade="all, delete-orphan", passive_deletes=True
    )


class CalibrationOffset(Base):
    """One path loss (positive dB) of a calibration set at one frequency."""

    __tablename__ = "calibration_offsets"
    __table_args__ = (
        sa.UniqueConstraint("calibration_set_id", "path", "freq_hz"),
        sa.CheckConstraint(in_list("path", OFFSET_PATHS), name="path"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    calibration_set_id: Mapped[int] = mapped_column(sa.ForeignKey("calibration_sets.id", ondelete="CASCADE"))
    path: Mapped[str] = mapped_column(sa.String(8))
    freq_hz: Mapped[float]
    loss_db: Mapped[float]

    calibration_set: Mapped[CalibrationSet] = relationship(back_populates="offsets")


class SystemResidual(Base):
    """Residual IM3 of the test system measured through a thru, as intercepts referred to the
    DUT input plane: the whole system, and its split into the sources' and the analyzer's share
    (the analyzer's at atten_db input attenuation). sweep_json keeps the thru readings."""

    __tablename__ = "system_residuals"
    __table_args__ = (sa.UniqueConstraint("calibration_set_id", "center_hz", "spacing_hz"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    calibration_set_id: Mapped[int] = mapped_column(sa.ForeignKey("calibration_sets.id", ondelete="CASCADE"))
    center_hz: Mapped[float]
    spacing_hz: Mapped[float]
    atten_db: Mapped[float]
    system_ip3_dbm: Mapped[float | None]
    source_ip3_dbm: Mapped[float | None]
    analyzer_ip3_dbm: Mapped[float | None]
    sweep_json: Mapped[dict[str, Any]] = mapped_column(default=dict)
    created_at: Mapped[dt.datetime] = mapped_column(default=utc_now)

    calibration_set: Mapped[CalibrationSet] = relationship(back_populates="residuals")

