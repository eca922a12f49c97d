"""The run's reporting choice (config/results_choice.py, kept in Run.metadata_json["results"]) and
one sweep's per-level rows for the store (analysis/single_level.py -> store/models/levels.py)."""

from __future__ import annotations

import math

from tonebench.analysis.conventions import DEFAULT_CONVENTION, INTERCEPT_CONVENTIONS
from tonebench.analysis.settings import DEFAULT_LEVEL_ACCURACY_DB
from tonebench.analysis.single_level import level_results

# The sweep arrays level_results reads.
LEVEL_INPUTS = ("tone_dbm", "pin1_dbm", "pin2_dbm", "pout_f1_dbm", "pout_f2_dbm", "im3_lower_dbm", "im3_upper_dbm",
                "noise_lower_dbm", "noise_upper_dbm")

_LEVEL_COLUMNS = ("im3_lower_dbc", "im3_upper_dbc", "im3_lower_dbc_pep", "im3_upper_dbc_pep", "iip3_lower_dbm",
                  "iip3_upper_dbm", "iip3_dbm", "oip3_lower_dbm", "oip3_upper_dbm", "oip3_dbm", "iip3_bound_db",
                  "im3_bound_db")


def run_choice(run) -> tuple[str, bool]:
    """(intercept convention, whether per-level results are stored) of a run; a run stored before
    the choice existed reports the mean and stores no per-level rows."""
    choice = (run.metadata_json or {}).get("results") or {}
    convention = choice.get("intercept", DEFAULT_CONVENTION)
    if convention not in INTERCEPT_CONVENTIONS:
        convention = DEFAULT_CONVENTION
    return convention, bool(choice.get("per_level", False))


def level_reason(reason: str | None, per_level: bool) -> str | None:
    """A refused fit's reason, saying what still stands when per-level results are stored."""
    if reason is None or not per_level:
        return reason
    return f"{reason}; only the fitted intercept is refused: IM3 dBc and single-point intercepts are given per level"


def level_accuracy_db(run) -> float:
    return ((run.metadata_json or {}).get("analyzer") or {}).get("level_accuracy_db", DEFAULT_LEVEL_ACCURACY_DB)


def _finite(value) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def level_rows(point_ids: list[int], arrays: dict, assessment, accuracy_db: float, convention: str) -> list[dict]:
    """One row (level_results columns less result_id) per point of the sweep (point_ids in its order)."""
    levels = level_results(arrays, assessment.point_flags, accuracy_db, convention)
    return [{"point_id": point_id, "tone_dbm": float(levels.tone_dbm[i]),
             **{name: _finite(getattr(levels, name)[i]) for name in _LEVEL_COLUMNS}}
            for i, point_id in enumerate(point_ids)]
