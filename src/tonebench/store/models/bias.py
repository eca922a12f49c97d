"""A FET's sweet-spot study: its DC transfer sweep, point by point, and its findings (the sweet
spot predicted from DC and the one measured by two-tone runs, which are ordinary runs)."""

from __future__ import annotations

import datetime as dt

import sqlalchemy as sa
from sqlalchemy.orm import Mapped, mapped_column, relationship

from tonebench.store.models.base import VERDICTS, Base, in_list, utc_now

FINDING_KINDS = ("dc-prediction", "two-tone")


class BiasStudy(Base):
    __tablename__ = "bias_studies"

    id: Mapped[int] = mapped_column(primary_key=True)
    guid: Mapped[str] = mapped_column(sa.String(36), unique=True)
    device_id: Mapped[int] = mapped_column(sa.ForeignKey("devices.id"), index=True)
    created_at: Mapped[dt.datetime] = mapped_column(default=utc_now)
    bench_name: Mapped[str] = mapped_column(sa.String(200))
    temp_k: Mapped[float | None]
    drain_v: Mapped[float]
    # The DC sweep's derivative method: Savitzky-Golay window and order, step, measured noise.
    window_points: Mapped[int]
    polyorder: Mapped[int]
    step_v: Mapped[float]
    current_sigma_a: Mapped[float]
    # The two-tone runs, coarse then fine (GUIDs, comma-separated): runs stay deletable on their own.
    run_guids: Mapped[str] = mapped_column(sa.Text)
    # The studies of one device at several chamber temperatures share a series GUID.
    series_guid: Mapped[str | None] = mapped_column(sa.String(36), index=True)
    temperature_c: Mapped[float | None]  # chamber set point; temp_k holds its reading
    center_hz: Mapped[float | None]  # the two-tone runs' centre frequency (spec limits cover a range)

    dc_points: Mapped[list[DcPoint]] = relationship(cascade="all, delete-orphan", order_by="DcPoint.seq")
    findings: Mapped[list[BiasFinding]] = relationship(cascade="all, delete-orphan")


class DcPoint(Base):
    __tablename__ = "dc_points"
    __table_args__ = (sa.UniqueConstraint("study_id", "seq"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(sa.ForeignKey("bias_studies.id", ondelete="CASCADE"))
    seq: Mapped[int]
    gate_v: Mapped[float]
    gate_read_v: Mapped[float]
    drain_read_v: Mapped[float]
    drain_current_a: Mapped[float]


class BiasFinding(Base):
    __tablename__ = "bias_findings"
    __table_args__ = (sa.CheckConstraint(in_list("kind", FINDING_KINDS), name="kind"),
                      sa.CheckConstraint(f"verdict IS NULL OR {in_list('verdict', VERDICTS)}", name="verdict"))

    id: Mapped[int] = mapped_column(primary_key=True)
    study_id: Mapped[int] = mapped_column(sa.ForeignKey("bias_studies.id", ondelete="CASCADE"), index=True)
    kind: Mapped[str] = mapped_column(sa.String(16))
    drive_tone_dbm: Mapped[float | None]
    sweet_spot_v: Mapped[float]
    sweet_spot_bound_v: Mapped[float]
    peak_iip3_dbm: Mapped[float]
    window_threshold_dbm: Mapped[float | None]
    window_low_v: Mapped[float | None]
    window_high_v: Mapped[float | None]
    window_bound_v: Mapped[float | None]
    drain_current_a: Mapped[float | None]
    gain_db: Mapped[float | None]
    input_offset_db: Mapped[float | None]
    method: Mapped[str] = mapped_column(sa.Text)
    # Against the part's spec limits on FINDING_PARAMETERS (catalog/limits.py), as results are.
    verdict: Mapped[str | None] = mapped_column(sa.String(16))
    verdict_detail: Mapped[str | None] = mapped_column(sa.Text)
