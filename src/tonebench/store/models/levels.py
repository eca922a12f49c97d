"""Results at each drive level of a sweep (analysis/single_level.py): one row per measured point
of a result whose plan asks for per-level results (a plan with fixed tone levels, or
`[results] per_level = true`). Replaced with the result on every analysis."""

from __future__ import annotations

import sqlalchemy as sa
from sqlalchemy.orm import Mapped, mapped_column, relationship

from tonebench.store.models.base import Base


class LevelResult(Base):
    """IM3 in dBc and the single-point intercepts at one tone level. dBc re one tone: each
    product against its adjacent tone (lower against f1, upper against f2); dBc re PEP: against
    the two tones' peak envelope power. Bounds None where a flag of the point cannot be bounded;
    the point's flags are its PointFlag rows."""

    __tablename__ = "level_results"

    id: Mapped[int] = mapped_column(primary_key=True)
    result_id: Mapped[int] = mapped_column(sa.ForeignKey("results.id", ondelete="CASCADE"), index=True)
    point_id: Mapped[int] = mapped_column(sa.ForeignKey("points.id", ondelete="CASCADE"))
    tone_dbm: Mapped[float]
    im3_lower_dbc: Mapped[float | None]
    im3_upper_dbc: Mapped[float | None]
    im3_lower_dbc_pep: Mapped[float | None]
    im3_upper_dbc_pep: Mapped[float | None]
    iip3_lower_dbm: Mapped[float | None]
    iip3_upper_dbm: Mapped[float | None]
    iip3_dbm: Mapped[float | None]  # under the result's intercept_convention
    oip3_lower_dbm: Mapped[float | None]
    oip3_upper_dbm: Mapped[float | None]
    oip3_dbm: Mapped[float | None]
    iip3_bound_db: Mapped[float | None]
    im3_bound_db: Mapped[float | None]

    point: Mapped["Point"] = relationship()  # noqa: F821  (its key names it in transfer files)
