"""Database tables (SQLAlchemy 2 declarative), portable between SQLite and PostgreSQL.

Every numeric column carries its unit in its name. Enumerations are plain strings with CHECK
constraints (portable, and Alembic batch mode on SQLite can copy them). Times are stored in UTC
and always come back timezone-aware.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

# Fixed constraint names so Alembic batch mode (SQLite) can find and recreate them.
NAMING_CONVENTION = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

RUN_STATUSES = ("running", "paused", "complete", "aborted", "failed")
POINT_STATUSES = ("measured", "failed")
EVENT_LEVELS = ("info", "warning", "error")
OFFSET_PATHS = ("in1", "in2", "out")
CALIBRATION_METHODS = ("table", "touchstone", "measured", "bench-file")
# What can make a reading or a result the test system's rather than the device's (design sec. 4).
FLAGS = ("analyzer-limited", "source-intermod-limited", "compressed", "tone-imbalance", "slope")
ANALYZER_CAUSES = ("noise", "distortion", "overload")
JOB_STATUSES = ("queued", "running", "done", "failed", "cancelled")
VERDICTS = ("pass", "fail", "no-limit")
SPEC_PARAMETERS = ("iip3_dbm", "oip3_dbm", "gain_db", "p1db_in_dbm", "iip2_dbm")


def utc_now() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc)


def _in_list(column: str, allowed: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(a) for a in allowed)})"


class UtcDateTime(sa.types.TypeDecorator):
    """Timezone-aware datetime stored as UTC.

    SQLite keeps no zone, so values are converted to UTC on the way in and tagged UTC on the
    way out; PostgreSQL stores TIMESTAMP WITH TIME ZONE. Naive datetimes are refused: a naive
    time is ambiguous once a database moves between hosts.
    """

    impl = sa.DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value, dialect):
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError(f"naive datetime {value!r}: give a timezone-aware time (UTC)")
        return value.astimezone(dt.timezone.utc)

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=dt.timezone.utc)
        return value.astimezone(dt.timezone.utc)


class Base(DeclarativeBase):
    metadata = sa.MetaData(naming_convention=NAMING_CONVENTION)
    type_annotation_map = {
        dt.datetime: UtcDateTime(),
        float: sa.Double(),
        dict[str, Any]: sa.JSON(),
        list[str]: sa.JSON(),
    }


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
    __tablename__ = "runs"
    __table_args__ = (sa.CheckConstraint(_in_list("status", RUN_STATUSES), name="status"),)

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
    calibration_set: Mapped[CalibrationSet | None] = relationship()
    # Children go with their run; passive_deletes lets the database's ON DELETE CASCADE do it.
    instruments: Mapped[list[Instrument]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True
    )
    offsets: Mapped[list[Offset]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True
    )
    points: Mapped[list[Point]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True,
        order_by="Point.seq",
    )
    results: Mapped[list[Result]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True
    )
    events: Mapped[list[Event]] = relationship(
        back_populates="run", cascade="all, delete-orphan", passive_deletes=True,
        order_by="Event.at",
    )


def _run_fk() -> Any:
    return sa.ForeignKey("runs.id", ondelete="CASCADE")


class Instrument(Base):
    """One instrument as it answered at the start of a run (role such as source1, analyzer)."""

    __tablename__ = "instruments"
    __table_args__ = (sa.UniqueConstraint("run_id", "role"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(_run_fk())
    role: Mapped[str] = mapped_column(sa.String(32))
    resource: Mapped[str] = mapped_column(sa.String(255))
    dialect: Mapped[str] = mapped_column(sa.String(100))
    idn: Mapped[str] = mapped_column(sa.Text)

    run: Mapped[Run] = relationship(back_populates="instruments")


class Offset(Base):
    """Path loss used by a run at one frequency; origin says where the number came from."""

    __tablename__ = "offsets"
    __table_args__ = (
        sa.CheckConstraint(_in_list("path", OFFSET_PATHS), name="path"),
        sa.Index("ix_offsets_run_path_freq", "run_id", "path", "freq_hz"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(_run_fk())
    path: Mapped[str] = mapped_column(sa.String(8))
    freq_hz: Mapped[float]
    loss_db: Mapped[float]
    origin: Mapped[str] = mapped_column(sa.Text)

    run: Mapped[Run] = relationship(back_populates="offsets")


class Point(Base):
    """One measured (or failed) two-tone point.

    raw_* are analyzer readings as read; pin/pout/im3/noise are DUT-referred: inputs at the DUT
    input plane, outputs at the DUT output plane. tone_dbm is the target per tone at the DUT
    input plane; source*_dbm is what the sources were commanded to.
    """

    __tablename__ = "points"
    __table_args__ = (
        sa.UniqueConstraint("run_id", "point_key"),
        sa.CheckConstraint(_in_list("status", POINT_STATUSES), name="status"),
        sa.Index("ix_points_run_center_spacing", "run_id", "center_hz", "spacing_hz"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(_run_fk())
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


def _flag_constraints() -> tuple:
    return (
        sa.CheckConstraint(_in_list("flag", FLAGS), name="flag"),
        sa.CheckConstraint(f"cause IS NULL OR {_in_list('cause', ANALYZER_CAUSES)}", name="cause"),
    )


class PointFlag(Base):
    """Why one reading may be the test system's: flag, cause (for analyzer-limited), a plain
    explanation and the error it may cause in dB."""

    __tablename__ = "point_flags"
    __table_args__ = _flag_constraints()

    id: Mapped[int] = mapped_column(primary_key=True)
    point_id: Mapped[int] = mapped_column(sa.ForeignKey("points.id", ondelete="CASCADE"), index=True)
    flag: Mapped[str] = mapped_column(sa.String(32))
    cause: Mapped[str | None] = mapped_column(sa.String(16))
    detail: Mapped[str] = mapped_column(sa.Text)
    error_db: Mapped[float | None]

    point: Mapped[Point] = relationship(back_populates="flags")


def result_group_key(center_hz: float, spacing_hz: float, bias_v: float | None) -> str:
    """Key of one (center, spacing, bias) group; a plain string so a missing bias still compares
    equal (a UNIQUE over a NULL column would let duplicates in)."""
    bias = "none" if bias_v is None else repr(float(bias_v))
    return f"center_hz={float(center_hz)!r};spacing_hz={float(spacing_hz)!r};bias_v={bias}"


class Result(Base):
    """Fitted intercepts for one group of points; intercepts are null when the fit was refused
    and reason says why."""

    __tablename__ = "results"
    __table_args__ = (
        sa.UniqueConstraint("run_id", "group_key"),
        sa.CheckConstraint(f"verdict IS NULL OR {_in_list('verdict', VERDICTS)}", name="verdict"),
        sa.Index("ix_results_center_spacing", "center_hz", "spacing_hz"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(_run_fk())
    group_key: Mapped[str] = mapped_column(sa.String(200))
    center_hz: Mapped[float]
    spacing_hz: Mapped[float]
    bias_v: Mapped[float | None]
    n_points: Mapped[int]
    n_valid: Mapped[int]
    gain_db: Mapped[float | None]
    iip3_lower_dbm: Mapped[float | None]
    iip3_upper_dbm: Mapped[float | None]
    iip3_dbm: Mapped[float | None]
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


class ResultFlag(Base):
    """Why a fitted result may be limited by the test system (same vocabulary as PointFlag)."""

    __tablename__ = "result_flags"
    __table_args__ = (*_flag_constraints(), sa.Index("ix_result_flags_result_flag", "result_id", "flag"))

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
    # Derived, never typed by hand: it must always match the three columns it stands for.
    target.group_key = result_group_key(target.center_hz, target.spacing_hz, target.bias_v)


class Event(Base):
    """Something worth a line in the run log (pause, leveling retry, overload, error)."""

    __tablename__ = "events"
    __table_args__ = (sa.CheckConstraint(_in_list("level", EVENT_LEVELS), name="level"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int | None] = mapped_column(_run_fk(), index=True)
    at: Mapped[dt.datetime] = mapped_column(default=utc_now)
    level: Mapped[str] = mapped_column(sa.String(16))
    kind: Mapped[str] = mapped_column(sa.String(64))
    message: Mapped[str] = mapped_column(sa.Text)
    details_json: Mapped[dict[str, Any]] = mapped_column(default=dict)

    run: Mapped[Run | None] = relationship(back_populates="events")


class CalibrationSet(Base):
    """Path losses with their provenance: how, when, by whom and with what they were found."""

    __tablename__ = "calibration_sets"
    __table_args__ = (sa.CheckConstraint(_in_list("method", CALIBRATION_METHODS), name="method"),)

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
        sa.CheckConstraint(_in_list("path", OFFSET_PATHS), name="path"),
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


class Job(Base):
    """A plan queued for a bench; a worker on that bench claims it, runs it, and links the run."""

    __tablename__ = "jobs"
    __table_args__ = (
        sa.CheckConstraint(_in_list("status", JOB_STATUSES), name="status"),
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
    frequency range, optionally only for some spacings and biases."""

    __tablename__ = "spec_limits"
    __table_args__ = (sa.CheckConstraint(_in_list("parameter", SPEC_PARAMETERS), name="parameter"),)

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
    created_at: Mapped[dt.datetime] = mapped_column(default=utc_now)
    notes: Mapped[str | None] = mapped_column(sa.Text)
