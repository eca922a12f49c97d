"""The declarative base shared by every table: naming convention, UTC times, column types, and the
enumerations the CHECK constraints allow.

Every numeric column carries its unit in its name. Enumerations are plain strings with CHECK
constraints (portable, and Alembic batch mode on SQLite can copy them). Times are stored in UTC
and always come back timezone-aware.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import sqlalchemy as sa
from sqlalchemy.orm import DeclarativeBase

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
# A limit judges a two-tone result's value, or a sweet-spot finding's (store/models/bias.py).
RESULT_PARAMETERS = ("iip3_dbm", "oip3_dbm", "gain_db", "p1db_in_dbm", "iip2_dbm")
FINDING_PARAMETERS = ("sweet_spot_v", "window_width_v", "sweet_spot_iip3_dbm")
# IMD at a stated tone level (a limit with tone_dbm), judged on a result's per-level rows
# (store/models/levels.py): the worse of the two products, re its tone and re the PEP.
LEVEL_PARAMETERS = ("im3_dbc", "im3_dbc_pep")
SPEC_PARAMETERS = RESULT_PARAMETERS + FINDING_PARAMETERS + LEVEL_PARAMETERS
# Which intercept a result reports (analysis/conventions.py); NULL: stored before the choice (mean).
INTERCEPT_CONVENTIONS = ("mean", "worse")


def utc_now() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc)


def in_list(column: str, allowed: tuple[str, ...]) -> str:
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


def run_fk() -> Any:
    """A child row's link to its run: it goes when the run is deleted."""
    return sa.ForeignKey("runs.id", ondelete="CASCADE")


def flag_constraints() -> tuple:
    return (
        sa.CheckConstraint(in_list("flag", FLAGS), name="flag"),
        sa.CheckConstraint(f"cause IS NULL OR {in_list('cause', ANALYZER_CAUSES)}", name="cause"),
    )
