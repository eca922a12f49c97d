"""The points table (one row per measured or failed point) and the flags of each point."""

from __future__ import annotations

import datetime as dt
from typing import Any

import sqlalchemy as sa
from sqlalchemy.orm import Mapped, mapped_column, relationship

from tonebench.store.models.base import (
    POINT_STATUSES,
    Base,
    flag_constraints,
    in_list,
    run_fk,
    utc_now,
)
from tonebench.store.models.runs import Run


class Point(Base):
    """One measured (or failed) two-tone point.

    raw_* are analyzer readings as read; pin/pout/im3/noise are DUT-referred: inputs at the DUT
    input plane, outputs at the DUT output plane. tone_dbm is the target per tone at the DUT
    input plane; source*_dbm is what the sources were commanded to.
    """

    __tablename__ = "points"
    __table_args__ = (
        sa.UniqueConstraint("run_id", "point_key"),
        sa.CheckConstraint(in_list("status", POINT_STATUSES), name="status"),
        sa.Index("ix_points_run_center_spacing", "run_id", "center_hz", "spacing_hz"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(run_fk())
    point_key: Mapped[str] = mapped_column(sa.String(200))
    seq: Mapped[int]
    status: Mapped[str] = mapped_column(sa.String(16))
    fail_reason: Mapped[str | None] = mapped_column(sa.Text)
    measured_at: Mapped[dt.datetime] = mapped_column(default=utc_now)
    bench_clock_s: Mapped[float]

    center_hz: Mapped[float]
    spacing_hz: Mapped[float]
    f1_hz: Mapped[float]
    f2_hz: Mapped[float]
    tone_dbm: Mapped[float]
    bias_v: Mapped[float | None]
    temperature_c: Mapped[float | None]  # chamber set point (the axis value)
    # LO power stepped by the plan (the axis value) (left out of transfer
    # records when None: catalog/transfer_format.py)
    lo_dbm: Mapped[float | None] = mapped_column(info={"transfer_omit_null": True})
    chamber_read_c: Mapped[float | None]  # the chamber's reading at the point
    # The gate and drain supplies' read-back at the point (bias benches only).
    gate_read_v: Mapped[float | None]
    gate_current_a: Mapped[float | None]
    drain_read_v: Mapped[float | None]
    drain_current_a: Mapped[float | None]

    source1_dbm: Mapped[float | None]
    source2_dbm: Mapped[float | None]
    # Closed-loop leveling: dB added to each source's open-loop setting to hit its target.
    source1_correction_db: Mapped[float | None]
    source2_correction_db: Mapped[float | None]

    in1_loss_db: Mapped[float | None]
    in2_loss_db: Mapped[float | None]
    out_loss_f1_db: Mapped[float | None]
    out_loss_f2_db: Mapped[float | None]
    out_loss_lower_db: Mapped[float | None]
    out_loss_upper_db: Mapped[float | None]

    raw_f1_dbm: Mapped[float | None]
    raw_f2_dbm: Mapped[float | None]
    raw_lower_dbm: Mapped[float | None]
    raw_upper_dbm: Mapped[float | None]
    raw_noise_lower_dbm: Mapped[float | None]
    raw_noise_upper_dbm: Mapped[float | None]
    span_hz: Mapped[float | None]
    rbw_hz: Mapped[float | None]
    vbw_hz: Mapped[float | None]
    atten_db: Mapped[float | None]
    ref_level_dbm: Mapped[float | None]
    overload: Mapped[bool | None]
    sweep_time_s: Mapped[float | None]
    # The attenuation-step check: IM3 read again with step_atten_db more input attenuation.
    step_atten_db: Mapped[float | None]
    raw_lower_step_dbm: Mapped[float | None]
    raw_upper_step_dbm: Mapped[float | None]
    # Second-order products f2-f1 ("diff") and f1+f2 ("sum"), when the plan asks for them.
    raw_diff_dbm: Mapped[float | None]
    raw_sum_dbm: Mapped[float | None]
    out_loss_diff_db: Mapped[float | None]
    out_loss_sum_db: Mapped[float | None]

    pin1_dbm: Mapped[float | None]
    pin2_dbm: Mapped[float | None]
    pout_f1_dbm: Mapped[float | None]
    pout_f2_dbm: Mapped[float | None]
    im3_lower_dbm: Mapped[float | None]
    im3_upper_dbm: Mapped[float | None]
    noise_lower_dbm: Mapped[float | None]
    noise_upper_dbm: Mapped[float | None]
    im2_diff_dbm: Mapped[float | None]
    im2_sum_dbm: Mapped[float | None]

    extra_json: Mapped[dict[str, Any] | None]

    run: Mapped[Run] = relationship(back_populates="points")
    flags: Mapped[list[PointFlag]] = relationship(
        back_populates="point", cascade="all, delete-orphan", passive_deletes=True
    )


class PointFlag(Base):
    """Why one reading may be the test system's: flag, cause (for analyzer-limited), a plain
    explanation and the error it may cause in dB."""

    __tablename__ = "point_flags"
    __table_args__ = flag_constraints()

    id: Mapped[int] = mapped_column(primary_key=True)
    point_id: Mapped[int] = mapped_column(sa.ForeignKey("points.id", ondelete="CASCADE"), index=True)
    flag: Mapped[str] = mapped_column(sa.String(32))
    cause: Mapped[str | None] = mapped_column(sa.String(16))
    detail: Mapped[str] = mapped_column(sa.Text)
    error_db: Mapped[float | None]

    point: Mapped[Point] = relationship(back_populates="flags")

