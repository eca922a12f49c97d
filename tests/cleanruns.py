"""Test helper: seeded runs of a clean bench, end to end (the runner, the simulated bench over TCP,
SQLite, the analysis), for the acceptance "no clean run carries an analyzer or source flag".

One database per call: a thru calibration measures the system residual once (at 0 dB attenuation,
where the analyzer's own IM3 dominates it and the sources' share is left unresolved), then each
seed runs a random clean device from its noise floor to past compression with automatic
attenuation. Used by tests/test_flag_meaning.py (a few seeds) and
tests/benchmarks/bench_clean_flags.py (a hundred).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from sqlalchemy import create_engine, select
from sqlalchemy.orm import Session

from tonebench.calibration import workflow
from tonebench.run.start import execute_run
from tonebench.sim.signal_chain import BenchTruth
from tonebench.sim.scenario import Scenario
from tonebench.store.models import Point, PointFlag, Result, ResultFlag, Run

CENTER_HZ = 2.45e9
# The bench's paths (linear in dB over frequency), so the imported offsets are exact.
PATHS = {"in1": (6.5, 0.8), "in2": (6.9, 0.9), "out": (1.5, 0.4)}
SYSTEM_FLAGS = ("analyzer-limited", "source-intermod-limited")  # the test system's own limits


def loss_db(path: str, freq_hz: float) -> float:
    ref_db, slope = PATHS[path]
    return ref_db + slope * (freq_hz - 2.45e9) / 1e9


@dataclass(frozen=True)
class CleanDevice:
    seed: int
    gain_db: float
    iip3_dbm: float
    p1db_dbm: float
    phase_deg: float
    level_error_db: float

    @classmethod
    def draw(cls, seed: int) -> CleanDevice:
        rng = np.random.default_rng([9, seed])
        iip3 = float(rng.uniform(-6.0, 10.0))
        return cls(seed, float(rng.uniform(10.0, 22.0)), iip3, iip3 - float(rng.uniform(9.7, 11.5)),
                   float(rng.uniform(-180.0, 180.0)), float(rng.uniform(-0.5, 0.5)))

    def true_iip3_dbm(self) -> float:
        return BenchTruth(Scenario(dut={"iip3_dbm": self.iip3_dbm})).true_iip3_dbm(CENTER_HZ)


def bench_text(device: CleanDevice) -> str:
    sim_paths = "\n".join(f"{p}_loss_db = {PATHS[p][0]!r}\n{p}_slope_db_per_ghz = {PATHS[p][1]!r}" for p in PATHS)
    offsets = "\n".join(f"{p} = [[2.3e9, {loss_db(p, 2.3e9)!r}], [2.6e9, {loss_db(p, 2.6e9)!r}]]" for p in PATHS)
    return f"""
[bench]
name = "clean-bench"
[instruments.source1]
dialect = "generic-source"
[instruments.source2]
dialect = "generic-source"
[instruments.analyzer]
dialect = "generic-analyzer"
performance = {{ mixer_toi_dbm = 15.0 }}
[offsets]
{offsets}
[limits]
max_tone_dbm = 0.0
max_analyzer_input_dbm = 20.0
expected_gain_db = {device.gain_db:.1f}
[simulation]
seed = {device.seed}
coherent_phase_deg = {device.phase_deg!r}
[simulation.dut]
gain_db = {device.gain_db!r}
iip3_dbm = {device.iip3_dbm!r}
p1db_dbm = {device.p1db_dbm!r}
[simulation.paths]
{sim_paths}
[simulation.analyzer]
mixer_toi_dbm = 15.0
level_error_db = {device.level_error_db!r}
"""


def plan_text(start_dbm: float, stop_dbm: float, atten_db: float | None = None) -> str:
    atten = "" if atten_db is None else f"atten_db = {atten_db!r}"
    return f"""
[plan]
name = "clean-check"
[device]
part_number = "KLN-2417A"
serial = "KLN24031-0900"
[sweep]
center_freqs_hz = [{CENTER_HZ!r}]
spacings_hz = [1.0e6]
tone_start_dbm = {start_dbm!r}
tone_stop_dbm = {stop_dbm!r}
tone_step_dbm = 2.0
[analyzer]
rbw_hz = 1000.0
{atten}
"""


@dataclass(frozen=True)
class CleanOutcome:
    device: CleanDevice
    iip3_dbm: float | None
    bound_db: float | None
    result_flags: tuple[str, ...]
    point_flags: tuple[tuple[str, str | None], ...]  # (flag, cause)

    @property
    def error_db(self) -> float | None:
        return None if self.iip3_dbm is None else self.iip3_dbm - self.device.true_iip3_dbm()

    @property
    def system_flagged(self) -> bool:
        """A result flag of the analyzer or the sources, or such a point flag other than the noise
        of the sweep's low end (which every sweep from the noise floor has, and only leaves out)."""
        points = [f for f, cause in self.point_flags if f in SYSTEM_FLAGS and cause != "noise"]
        return bool(points) or any(f in SYSTEM_FLAGS for f in self.result_flags)


def clean_runs(folder: Path, seeds) -> list[CleanOutcome]:
    """Calibrate once (thru residual at 0 dB attenuation), then one run per seed; the outcomes."""
    db = f"sqlite:///{folder / 'clean.db'}"
    files = {}
    for path in PATHS:
        files[path] = folder / f"{path}.csv"
        files[path].write_text("freq_hz,loss_db\n" + "\n".join(f"{f!r},{loss_db(path, f)!r}" for f in (2.3e9, 2.6e9)))
    workflow.import_tables(db, "thru-cal", files)
    first = folder / "bench-cal.toml"
    first.write_text(bench_text(CleanDevice.draw(0)), encoding="utf-8")
    residual_plan = folder / "residual.toml"
    residual_plan.write_text(plan_text(-34.0, -22.0, atten_db=0.0), encoding="utf-8")
    workflow.measure_residual(db, "thru-cal", first, residual_plan)
    outcomes = []
    engine = create_engine(db)
    for seed in seeds:
        device = CleanDevice.draw(seed)
        bench = folder / f"bench-{seed}.toml"
        bench.write_text(bench_text(device), encoding="utf-8")
        plan = folder / f"plan-{seed}.toml"
        # From the noise floor (IM3 under it) to past the two-tone 1 dB compression.
        start = round(device.iip3_dbm - 40.0)
        plan.write_text(plan_text(start, start + 2.0 * round((device.p1db_dbm - 2.0 - start) / 2.0)), encoding="utf-8")
        outcome = execute_run(plan, bench, db, None, cal_name="thru-cal", on_warning=lambda m: None)
        with Session(engine) as session:
            run = session.scalars(select(Run).where(Run.guid == outcome.guid)).one()
            result = session.scalars(select(Result).where(Result.run_id == run.id)).one()
            point_ids = select(Point.id).where(Point.run_id == run.id)
            outcomes.append(CleanOutcome(
                device, result.iip3_dbm, result.iip3_bound_db,
                tuple(session.scalars(select(ResultFlag.flag).where(ResultFlag.result_id == result.id))),
                tuple((flag, cause) for flag, cause in session.execute(
                    select(PointFlag.flag, PointFlag.cause).where(PointFlag.point_id.in_(point_ids))))))
    engine.dispose()
    return outcomes
