"""What a run (new or resumed) holds once every check has passed: handed from start or resume to
the drive that measures it and the ending that stores how it ended."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from sqlalchemy.orm import sessionmaker

from tonebench.calibration.leveling import Leveler
from tonebench.config.bench_file import LoadedBench
from tonebench.config.plan_file import LoadedPlan
from tonebench.instruments.open_bench import OpenBench
from tonebench.instruments.supervision import Supervision
from tonebench.plan.points import PlannedPoint
from tonebench.planes.loss_table import LossTable
from tonebench.run.event_log import RunLog
from tonebench.run.events import EventRelay
from tonebench.store.records import RunRecorder


@dataclass
class PreparedRun:
    """Everything one run (or its resumption) needs once the checks have passed."""

    recorder: RunRecorder
    log: RunLog
    sessions: sessionmaker
    bench: LoadedBench
    plan: LoadedPlan
    points: list[PlannedPoint]
    done_keys: frozenset[str]
    offsets: dict[str, LossTable]
    instruments: OpenBench
    supervision: Supervision
    relay: EventRelay
    leveler: Leveler | None
    db_url: str
    report_path: Path | None
    calibration: str | None
    resume_note: str | None = None  # set when resuming: the "resume" event, written once the run is ours
