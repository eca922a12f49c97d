"""Database tables (SQLAlchemy 2 declarative), portable between SQLite and PostgreSQL, one module
per family: base (declarative base, types, enumerations), runs (bench, device, plan, run,
instruments, offsets, events), points, results, levels (results per drive level), calibration, queue (jobs, spec limits), bias
(sweet-spot studies: DC points and findings).

Every name is importable from here (`from tonebench.store.models import Point`); importing this
package registers every table with Base.metadata, which the migrations compare against.
"""

from tonebench.store.models.base import (
    ANALYZER_CAUSES,
    CALIBRATION_METHODS,
    EVENT_LEVELS,
    FINDING_PARAMETERS,
    FLAGS,
    INTERCEPT_CONVENTIONS,
    LEVEL_PARAMETERS,
    JOB_STATUSES,
    NAMING_CONVENTION,
    OFFSET_PATHS,
    POINT_STATUSES,
    RESULT_PARAMETERS,
    RUN_STATUSES,
    SPEC_PARAMETERS,
    VERDICTS,
    Base,
    UtcDateTime,
    utc_now,
)
from tonebench.store.models.bias import BiasFinding, BiasStudy, DcPoint
from tonebench.store.models.calibration import (
    CalibrationOffset,
    CalibrationSet,
    SystemResidual,
)
from tonebench.store.models.points import Point, PointFlag
from tonebench.store.models.queue import Job, SpecLimit
from tonebench.store.models.results import Result, ResultFlag, result_group_key
from tonebench.store.models.levels import LevelResult
from tonebench.store.models.runs import (
    Bench,
    Device,
    Event,
    Instrument,
    Offset,
    Plan,
    Run,
)

__all__ = [
    "ANALYZER_CAUSES", "CALIBRATION_METHODS", "EVENT_LEVELS", "FINDING_PARAMETERS", "FLAGS", "INTERCEPT_CONVENTIONS", "LEVEL_PARAMETERS", "JOB_STATUSES", "NAMING_CONVENTION",
    "OFFSET_PATHS", "POINT_STATUSES", "RESULT_PARAMETERS", "RUN_STATUSES", "SPEC_PARAMETERS", "VERDICTS", "Base", "UtcDateTime",
    "utc_now", "Bench", "Device", "Event", "Instrument", "Offset", "Plan", "Run", "Point", "PointFlag",
    "Result", "ResultFlag", "LevelResult", "result_group_key", "CalibrationOffset", "CalibrationSet", "SystemResidual",
    "Job", "SpecLimit", "BiasStudy", "DcPoint", "BiasFinding",
]
