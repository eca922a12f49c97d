"""Starting a new run: load the plan and bench files, refuse what cannot run before anything is
written or RF goes on, store the run, then drive it (tonebench.run.drive)."""

from __future__ import annotations

import time
from collections.abc import Callable
from contextlib import ExitStack
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy.orm import sessionmaker

from tonebench.calibration.leveling import Leveler
from tonebench.config.bench_file import LoadedBench, load_bench
from tonebench.config.plan_file import LoadedPlan, load_plan
from tonebench.config.results_choice import results_choice
from tonebench.instruments.open_bench import OpenBench, bench_freq_ranges, role_dialects
from tonebench.instruments.supervision import Supervision
from tonebench.plan.limits import check_plan, check_plan_frequencies, check_plan_parts
from tonebench.plan.points import PlannedPoint, expand
from tonebench.report.run_report import check_report_path
from tonebench.run.bench_connection import connect_bench, print_warning
from tonebench.run.bench_time import BenchTimeEstimate, estimate_bench_time
from tonebench.run.preflight import planned_setups
from tonebench.run.calibration_choice import (
    ChosenCalibration,
    calibration_set_id,
    choose_calibration,
    offsets_from_bench,  # re-exported: tests/config import it from here
)
from tonebench.run.drive import drive
from tonebench.run.ending import BenchTimeTaken, RunOutcome
from tonebench.run.event_log import RunLog, log_path_for
from tonebench.run.events import EventRelay
from tonebench.run.leveler_setup import make_leveler
from tonebench.run.mixer_run import check_mixer_plan, tighten_power_guards
from tonebench.run.prepared import PreparedRun
from tonebench.run.sequencer import ProgressCallback
from tonebench.store.bench_lock import check_free_at as check_bench_free_at
from tonebench.store.bench_lock import hold_bench
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import Run
from tonebench.store.records import RunRecorder, device_differences


def execute_run(
    plan_path: Path,
    bench_path: Path,
    db_url: str,
    report_path: Path | None,
    on_progress: ProgressCallback | None = None,
    on_sim_started: Callable[[object], None] | None = None,
    *,
    cal_name: str | None = None,
    on_warning: Callable[[str], None] | None = None,
    on_run_started: Callable[[str], None] | None = None,
    held_at_c: float | None = None,
    on_estimate: Callable[[BenchTimeEstimate], None] | None = None,
) -> RunOutcome:
    """Measure a plan on a bench. cal_name picks a calibration set (else the bench file's
    [bench] calibration, else its [offsets]); on_warning gets warnings before the run starts
    (default: one line on stderr); on_run_started gets the run's GUID once it is stored;
    held_at_c: the chamber temperature the caller has just soaked at (Sequencer); on_estimate
    gets the bench-time estimate before RF goes on (it is stored with the run, and what the run
    took beside it at the end).

    A run stopped by the bench file's on_point_failure policy or by the watchdog returns with
    status 'paused' or 'aborted' (RF off, the reason stored); Ctrl-C, SIGTERM and errors raise;
    a RunCancelled raised by on_progress stops it as aborted."""
    if report_path is not None:  # refused before the database is written and RF goes on
        check_report_path(report_path)
    files = _RunFiles(plan_path, bench_path, load_plan(plan_path), load_bench(bench_path))
    sims = []

    def started(sim) -> None:
        sims.append(sim)
        if on_sim_started:
            on_sim_started(sim)

    with ExitStack() as stack:
        checked = _check_and_connect(stack, files, db_url, cal_name, started, on_warning or print_warning)
        dialects = role_dialects(files.bench.settings)
        setups = planned_setups(checked.points, files.plan.settings, files.bench.settings, dialects,
                                checked.chosen.tables)
        estimate = estimate_bench_time(checked.points, files.plan.settings, files.bench.settings, dialects,
                                       setups=[(planned.tone_setup, planned.setup) for planned in setups])
        prepared = _store_start(stack, files, checked, db_url, report_path, on_warning or print_warning, estimate)
        if on_estimate:
            on_estimate(estimate)
        clock = (lambda: sims[0].bench.clock_s) if sims else time.monotonic
        start_s = clock()
        outcome = drive(prepared, on_progress, on_run_started, held_at_c)
        outcome.bench_time = BenchTimeTaken(estimate.total_s, clock() - start_s, "virtual" if sims else "wall")
        prepared.recorder.add_metadata(bench_time_s=outcome.bench_time.taken_s, bench_time_clock=outcome.bench_time.clock)
        return outcome


@dataclass
class _RunFiles:
    plan_path: Path
    bench_path: Path
    plan: LoadedPlan
    bench: LoadedBench

    @property
    def origin(self) -> str:
        return f"plan {self.plan_path}"


@dataclass
class _Checked:
    """A new run that passed every check, its bench connected; nothing written yet."""

    points: list[PlannedPoint]
    chosen: ChosenCalibration
    sessions: sessionmaker | None
    instruments: OpenBench
    relay: EventRelay
    supervision: Supervision
    leveler: Leveler | None


def _check_and_connect(stack: ExitStack, files: _RunFiles, db_url: str, cal_name: str | None,
                       on_sim_started, warn: Callable[[str], None]) -> _Checked:
    """Everything that can refuse the plan, before the database is written and RF goes on."""
    plan, bench = files.plan, files.bench
    points = expand(plan.settings)
    cal_name = cal_name or bench.settings.bench.calibration
    sessions = None
    if cal_name is not None:
        # Read only: the set is looked up before anything can be written.
        sessions = _open_sessions(stack, db_url)
    chosen = choose_calibration(bench, cal_name, sessions, points, files.origin)
    if chosen.stale_message:
        warn(chosen.stale_message)
    check_plan_frequencies(points, plan.settings, bench.settings, bench_freq_ranges(bench.settings), files.origin)
    check_plan_parts(points, plan.settings, bench.settings, files.origin)
    check_mixer_plan(points, plan.settings, bench.settings, bench_freq_ranges(bench.settings),
                     chosen.tables.get("out"), files.origin)
    check_bench_free_at(db_url, sessions, bench.settings.bench.name)  # before talking to its instruments
    instruments, relay, supervision = connect_bench(stack, bench, on_sim_started, warn, chosen.tables)
    tighten_power_guards(instruments, points, plan.settings.mixer, bench.settings.limits, chosen.tables,
                         instruments.analyzer.limits.get("damage_dbm"))
    check_plan(points, chosen.tables, bench.settings.limits, instruments.source_ranges,
               instruments.analyzer.limits.get("damage_dbm"), files.origin)
    leveler = make_leveler(bench, instruments, points, files.origin)
    return _Checked(points, chosen, sessions, instruments, relay, supervision, leveler)


def _open_sessions(stack: ExitStack, db_url: str) -> sessionmaker:
    engine = open_database(db_url)
    stack.callback(engine.dispose)
    return session_factory(engine)


def _store_start(stack: ExitStack, files: _RunFiles, checked: _Checked, db_url: str,
                 report_path: Path | None, warn: Callable[[str], None], estimate: BenchTimeEstimate) -> PreparedRun:
    """Hold the bench, store the run with what it is measured with, open its log."""
    plan, bench, chosen = files.plan, files.bench, checked.chosen
    sessions = checked.sessions or _open_sessions(stack, db_url)
    set_id = calibration_set_id(sessions, chosen, bench, files.bench_path)
    hold = stack.enter_context(hold_bench(sessions, bench.settings.bench.name))  # one run per bench
    device = plan.settings.device
    differs = device_differences(sessions, device.model_dump())
    differs_line = (f"plan [device] {device.part_number} {device.serial} disagrees with the device registry: "
                    f"{'; '.join(differs)}; the run is stored against the registry's device") if differs else None
    if differs_line:
        warn(differs_line)
    recorder = hold.commit(_start_recorder(hold.sessions, files, checked, estimate))
    if differs_line:
        recorder.event("warning", "device-differs", differs_line)
    with sessions.begin() as session:
        session.get(Run, recorder.run_id).calibration_set_id = set_id
    if chosen.stale_message:
        recorder.event("warning", "calibration-stale", chosen.stale_message, {"calibration_set_id": set_id})
    log = RunLog(recorder, log_path_for(db_url))
    log.line("info", "run-start", f"run {recorder.guid} started: plan {plan.settings.plan.name}, "
                                  f"bench {bench.settings.bench.name}, {len(checked.points)} points")
    return PreparedRun(
        recorder=recorder, log=log, sessions=sessions, bench=bench, plan=plan, points=checked.points,
        done_keys=frozenset(), offsets=chosen.tables, instruments=checked.instruments,
        supervision=checked.supervision, relay=checked.relay, leveler=checked.leveler, db_url=db_url,
        report_path=report_path, calibration=None if chosen.view is None else chosen.view.name,
    )


def _start_recorder(sessions: sessionmaker, files: _RunFiles, checked: _Checked,
                    estimate: BenchTimeEstimate) -> RunRecorder:
    plan, bench = files.plan, files.bench
    return RunRecorder.start(
        sessions,
        bench_name=bench.settings.bench.name,
        bench_description=bench.settings.bench.description,
        device=plan.settings.device.model_dump(),
        plan_name=plan.settings.plan.name,
        plan_text=plan.text,
        plan_sha256=plan.sha256,
        simulated=bench.settings.simulated,
        instruments=[
            {"role": i.role, "resource": i.resource, "dialect": i.dialect, "idn": i.idn}
            for i in checked.instruments.instruments
        ],
        offsets=[
            {"path": table.path, "freq_hz": float(f), "loss_db": float(l), "origin": table.origin}
            for table in checked.chosen.tables.values()
            for f, l in zip(table.freqs_hz, table.losses_db)
        ],
        metadata={
            "plan_file": str(files.plan_path), "bench_file": str(files.bench_path),
            "points_planned": len(checked.points), "leveling": checked.leveler is not None,
            "analyzer": analyzer_figures(checked.instruments),
            # Which intercept the results report and whether per-level results are stored.
            "results": results_choice(plan.settings, bench.settings),
            "bench_time_estimate": estimate.as_dict(),
            # A mixer plan's frequency plan (LO, injection, output): the analyzer read at the IF.
            **({} if plan.settings.mixer is None else {"mixer": plan.settings.mixer.model_dump()}),
        },
    )


def analyzer_figures(open_instruments: OpenBench) -> dict:
    """What the analysis needs to know of the analyzer, kept with the run so a later `analyze`
    judges the readings by the instrument that took them: its mixer TOI, noise floor, relative
    level accuracy (dialect [performance], bench-file overrides) and mixer limit."""
    analyzer = open_instruments.analyzer
    figures = {key: analyzer.performance[key] for key in ("mixer_toi_dbm", "danl_dbm_per_hz", "level_accuracy_db",
                                                          "mixer_shi_dbm", "phase_noise_dbc_per_hz",
                                                          "phase_noise_offset_hz")
               if key in analyzer.performance}
    if "max_mixer_dbm" in analyzer.limits:
        figures["max_mixer_dbm"] = analyzer.limits["max_mixer_dbm"]
    return figures


__all__ = ["analyzer_figures", "execute_run", "offsets_from_bench"]
