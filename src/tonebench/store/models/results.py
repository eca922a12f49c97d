"""Fitted results per sweep group and their flags."""

from __future__ import annotations

import datetime as dt
from typing import Any

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.orm import Mapped, mapped_column, relationship

from tonebench.store.models.base import (
    INTERCEPT_CONVENTIONS,
    VERDICTS,
    Base,
    flag_constraints,
    in_list,
    run_fk,
    utc_now,
)
from tonebench.store.models.runs import Run


def result_group_key(center_hz: float, spacing_hz: float, bias_v: float | None,
                     temperature_c: float | None = None, lo_dbm: float | None = None) -> str:
    """Key of one (center, spacing, bias, temperature, LO power) group; a plain string so a missing
    bias still compares equal (a UNIQUE over a NULL column would let duplicates in). A result
    without a temperature or an LO level keeps the key it had before those axes."""
    bias = "none" if bias_v is None else repr(float(bias_v))
    key = f"center_hz={float(center_hz)!r};spacing_hz={float(spacing_hz)!r};bias_v={bias}"
    if temperature_c is not None:
        key += f";temperature_c={float(temperature_c)!r}"
    return key if lo_dbm is None else f"{key};lo_dbm={float(lo_dbm)!r}"


class Result(Base):
    """Fitted intercepts for one group of points; intercepts are null when the fit was refused
    and reason says why."""

    __tablename__ = "results"
    __table_args__ = (
        sa.UniqueConstraint("run_id", "group_key"),
        sa.CheckConstraint(f"verdict IS NULL OR {in_list('verdict', VERDICTS)}", name="verdict"),
        sa.CheckConstraint(f"intercept_convention IS NULL OR {in_list('intercept_convention', INTERCEPT_CONVENTIONS)}",
                           name="intercept_convention"),
        sa.Index("ix_results_center_spacing", "center_hz", "spacing_hz"),
        # The other filters of `find` (checked with each backend's planner, tests/catalog).
        sa.Index("ix_results_spacing", "spacing_hz"),
        sa.Index("ix_results_bias", "bias_v"),
        sa.Index("ix_results_verdict", "verdict"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(run_fk())
    group_key: Mapped[str] = mapped_column(sa.String(200))
    center_hz: Mapped[float]
    spacing_hz: Mapped[float]
    bias_v: Mapped[float | None]
    temperature_c: Mapped[float | None]  # chamber set point
    # LO power stepped by the plan; None when not stepped (left out of transfer
    # records when None: catalog/transfer_format.py)
    lo_dbm: Mapped[float | None] = mapped_column(info={"transfer_omit_null": True})
    n_points: Mapped[int]
    n_valid: Mapped[int]
    gain_db: Mapped[float | None]
    iip3_lower_dbm: Mapped[float | None]
    iip3_upper_dbm: Mapped[float | None]
    iip3_dbm: Mapped[float | None]  # lower and upper under intercept_convention
    # "mean" or "worse" (analysis/conventions.py); NULL: stored before the choice existed (mean).
    intercept_convention: Mapped[str | None] = mapped_column(sa.String(8))
    oip3_lower_dbm: Mapped[float | None]
    oip3_upper_dbm: Mapped[float | None]
    oip3_dbm: Mapped[float | None]
    slope_fundamental: Mapped[float | None]
    slope_im3_lower: Mapped[float | None]
    slope_im3_upper: Mapped[float | None]
    p1db_in_dbm: Mapped[float | None]
    p1db_out_dbm: Mapped[float | None]
    iip3_bound_db: Mapped[float | None]  # IIP3 lies within +/- this of the reported value
    iip2_dbm: Mapped[float | None]
    oip2_dbm: Mapped[float | None]
    slope_im2: Mapped[float | None]
    calibration_set_id: Mapped[int | None] = mapped_column(sa.ForeignKey("calibration_sets.id"))
    verdict: Mapped[str | None] = mapped_column(sa.String(16))
    verdict_detail: Mapped[str | None] = mapped_column(sa.Text)
    reason: Mapped[str | None] = mapped_column(sa.Text)
    valid_tone_min_dbm: Mapped[float | None]
    valid_tone_max_dbm: Mapped[float | None]
    details_json: Mapped[dict[str, Any]] = mapped_column(default=dict)
    created_at: Mapped[dt.datetime] = mapped_column(default=utc_now)

    run: Mapped[Run] = relationship(back_populates="results")
    flags: Mapped[list[ResultFlag]] = relationship(
        back_populates="result", cascade="all, delete-orphan", passive_deletes=True
    )
    # Results per drive level (store/models/levels.py), when the run's plan asks for them.
    levels: Mapped[list["LevelResult"]] = relationship(  # noqa: F821
        cascade="all, delete-orphan", passive_deletes=True, order_by="LevelResult.tone_dbm"
    )


class ResultFlag(Base):
    """Why a fitted result may be limited by the test system (same vocabulary as PointFlag)."""

    __tablename__ = "result_flags"
    __table_args__ = (*flag_constraints(), sa.Index("ix_result_flags_result_flag", "result_id", "flag"))

    id: Mapped[int] = mapped_column(primary_key=True)
    result_id: Mapped[int] = mapped_column(sa.ForeignKey("results.id", ondelete="CASCADE"))
    flag: Mapped[str] = mapped_column(sa.String(32))
    cause: Mapped[str | None] = mapped_column(sa.String(16))
    detail: Mapped[str] = mapped_column(sa.Text)
    error_db: Mapped[float | None]

    result: Mapped[Result] = relationship(back_populates="flags")


@event.listens_for(Result, "before_insert")
@event.listens_for(Result, "before_update")
def _fill_group_key(mapper, connection, target: Result) -> None:
    # Derived, never typed by hand: it must always match the columns it stands for.
    target.group_key = result_group_key(target.center_hz, target.spacing_hz, target.bias_v, target.temperature_c,
                                        target.lo_dbm)

