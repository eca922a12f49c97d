"""The per-level results and intercept convention of found results, for `find --json` and views
(kept apart from catalog/query.py: read only for the results already found)."""

from __future__ import annotations

import sqlalchemy as sa
from sqlalchemy.orm import Session

from tonebench.analysis.asymmetry import im3_asymmetry_db
from tonebench.store.models import LevelResult, Result

LEVEL_FIELDS = ("tone_dbm", "im3_lower_dbc", "im3_upper_dbc", "im3_lower_dbc_pep", "im3_upper_dbc_pep",
                "iip3_lower_dbm", "iip3_upper_dbm", "iip3_dbm", "oip3_dbm", "iip3_bound_db", "im3_bound_db")
_CHUNK = 500  # result ids per query


def result_extras(session: Session, result_ids: list[int]) -> dict[int, dict]:
    """Per result id: {"im3_asymmetry_db": upper minus lower IM3 (analysis/asymmetry.py),
    "intercept_convention": "mean"|"worse", "levels": [per-level row, tone up]}.
    A result stored before the convention existed reports the mean."""
    out: dict[int, dict] = {}
    for first in range(0, len(result_ids), _CHUNK):
        ids = result_ids[first:first + _CHUNK]
        for result_id, convention, oip3_lower, oip3_upper in session.execute(
                sa.select(Result.id, Result.intercept_convention, Result.oip3_lower_dbm, Result.oip3_upper_dbm)
                .where(Result.id.in_(ids))):
            out[result_id] = {"im3_asymmetry_db": im3_asymmetry_db(oip3_lower, oip3_upper),
                              "intercept_convention": convention or "mean", "levels": []}
        columns = [LevelResult.result_id, *(getattr(LevelResult, name) for name in LEVEL_FIELDS)]
        for row in session.execute(sa.select(*columns).where(LevelResult.result_id.in_(ids))
                                   .order_by(LevelResult.result_id, LevelResult.tone_dbm)):
            out[row[0]]["levels"].append(dict(zip(LEVEL_FIELDS, row[1:])))
    return out
