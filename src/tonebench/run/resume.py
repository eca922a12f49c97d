"""Resuming an interrupted run: the stored plan and offsets, the same bench and instruments, the
points already measured skipped by key, then the run driven again (tonebench.run.drive)."""

from __future__ import annotations

from collections.abc import Callable
from contextlib import ExitStack
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy.orm import sessionmaker

from tonebench.config.bench_file import LoadedBench, load_bench
from tonebench.config.plan_file import LoadedPlan, load_plan, plan_from_text
from tonebench.errors import InputError
from tonebench.instruments.open_bench import bench_freq_ranges
from tonebench.plan.limits import check_plan, check_plan_frequencies, check_plan_parts
from tonebench.plan.points import expand
from tonebench.planes.loss_table import LossTable
from tonebench.report.run_report import check_report_path
from tonebench.run.bench_connection import check_same_instruments, connect_bench
from tonebench.run.drive import drive
from tonebench.run.ending import RunOutcome
from tonebench.run.event_log import RunLog, log_path_for
from tonebench.run.leveler_setup import make_leveler
from tonebench.run.mixer_run import check_mixer_plan, tighten_power_guards
from tonebench.run.prepared import PreparedRun
from tonebench.run.sequencer import ProgressCallback
from tonebench.store.bench_lock import check_free as check_bench_free
from tonebench.store.bench_lock import hold_bench
from tonebench.store.database import open_database, session_factory
from tonebench.store.lookups import find_run
from tonebench.store.models import Run
from tonebench.store.ownership import (
    check_resumable,
    close_dead_runs,
    process_owner,
    stored_points,
)
from tonebench.store.records import RunRecorder


@dataclass
class _StoredRun:
    """What a resume needs of the stored run, read in one session."""

    guid: str
    run_id: int
    bench_name: str
    plan_text: str
    plan_sha256: str
    metadata: dict
    instrument_ids: dict[str, str]  # role -> *IDN? reply
    offsets: dict[str, LossTable]
    calibration: str | None
    states: dict[str, str]  # point key -> measured / failed


def resume_run(
    ident: str,
    db_url: str,
    *,
    bench_path: Path | None = None,
    plan_path: Path | None = None,
    report_path: Path | None = None,
    on_progress: ProgressCallback | None = None,
    on_sim_started: Callable[[object], None] | None = None,
    on_run_started: Callable[[str], None] | None = None,
    on_warning: Callable[[str], None] | None = None,
) -> RunOutcome:
    """Continue an interrupted run (killed, crashed, paused, aborted or failed).

    The plan is the one stored with the run (a plan file given must be identical); the bench file
    is the one the run started with unless `bench_path` names another for the same bench, and its
    instruments must identify as the same ones (maker, model, serial). The offsets are those the
    run stored. Points already measured are skipped by key; failed ones are measured again.
    """
    if report_path is not None:  # refused before the database is written and RF goes on
        check_report_path(report_path)
    engine = open_database(db_url)
    with ExitStack() as stack:
        stack.callback(engine.dispose)
        sessions = session_factory(engine)
        close_dead_runs(sessions)
        stored = _read_stored(sessions, ident)
        plan = _stored_plan(stored, plan_path)
        bench = _same_bench(stored, Path(bench_path or stored.metadata.get("bench_file", "")))
        prepared = _check_and_hold(stack, sessions, stored, plan, bench, db_url, report_path,
                                   on_sim_started, on_warning)
        return drive(prepared, on_progress, on_run_started)


def _read_stored(sessions: sessionmaker, ident: str) -> _StoredRun:
    with sessions() as session:
        run = find_run(session, ident)
        states = stored_points(session, run.id)
        check_resumable(run, sum(1 for status in states.values() if status == "failed"))
        return _StoredRun(
            guid=run.guid, run_id=run.id, bench_name=run.bench.name, plan_text=run.plan.text,
            plan_sha256=run.plan.sha256, metadata=dict(run.metadata_json or {}),
            instrument_ids={inst.role: inst.idn for inst in run.instruments}, offsets=stored_offsets(run),
            calibration=run.calibration_set.name if run.calibration_set is not None else None, states=states,
        )


def _stored_plan(stored: _StoredRun, plan_path: Path | None) -> LoadedPlan:
    """The plan stored with the run; a plan file given must be the same plan."""
    if plan_path is not None:
        given = load_plan(plan_path)
        if given.sha256 != stored.plan_sha256:
            raise InputError(
                f"plan {plan_path} differs from the plan run {stored.guid} started with (sha256 {given.sha256[:12]} "
                f"vs {stored.plan_sha256[:12]}); a resume measures the same plan"
            )
    return plan_from_text(stored.plan_text, Path(stored.metadata.get("plan_file", "stored plan")),
                          f"run {stored.guid} stored plan")


def _same_bench(stored: _StoredRun, bench_path: Path) -> LoadedBench:
    bench = load_bench(bench_path)
    if bench.settings.bench.name != stored.bench_name:
        raise InputError(
            f"bench file {bench_path} is for bench {bench.settings.bench.name!r}; run {stored.guid} was measured "
            f"on {stored.bench_name!r}"
        )
    return bench


def _check_and_hold(stack: ExitStack, sessions: sessionmaker, stored: _StoredRun, plan: LoadedPlan,
                    bench: LoadedBench, db_url: str, report_path: Path | None, on_sim_started,
                    on_warning) -> PreparedRun:
    """The checks of a new run on the points left, the bench connected and held for this run."""
    points = expand(plan.settings)
    done_keys = frozenset(key for key, status in stored.states.items() if status == "measured")
    remaining = [point for point in points if point.key not in done_keys]
    plan_origin = f"run {stored.guid} plan"
    check_plan_frequencies(remaining, plan.settings, bench.settings, bench_freq_ranges(bench.settings), plan_origin)
    check_plan_parts(remaining, plan.settings, bench.settings, plan_origin)
    check_bench_free(sessions, stored.bench_name, except_run_id=stored.run_id)  # before talking to its instruments
    instruments, relay, supervision = connect_bench(stack, bench, on_sim_started, on_warning, stored.offsets)
    tighten_power_guards(instruments, remaining, plan.settings.mixer, bench.settings.limits, stored.offsets,
                         instruments.analyzer.limits.get("damage_dbm"))
    check_same_instruments(stored.guid, stored.instrument_ids, instruments)
    check_plan(remaining, stored.offsets, bench.settings.limits, instruments.source_ranges,
               instruments.analyzer.limits.get("damage_dbm"), plan_origin)
    check_mixer_plan(remaining, plan.settings, bench.settings, bench_freq_ranges(bench.settings),
                     stored.offsets.get("out"), plan_origin)
    leveler = make_leveler(bench, instruments, points, plan_origin)
    stack.enter_context(hold_bench(sessions, stored.bench_name, resume_run_id=stored.run_id))  # one run per bench
    recorder = RunRecorder(sessions, stored.run_id, stored.guid)
    failed_before = sum(1 for status in stored.states.values() if status == "failed")
    again = f", {failed_before} of them failed before" if failed_before else ""
    note = f"resumed by {process_owner()}: {len(done_keys)} already stored, {len(remaining)} to measure{again}"
    return PreparedRun(
        recorder=recorder, log=RunLog(recorder, log_path_for(db_url)), sessions=sessions,
        bench=bench, plan=plan, points=points, done_keys=done_keys, offsets=stored.offsets,
        instruments=instruments, supervision=supervision, relay=relay, leveler=leveler, db_url=db_url,
        report_path=report_path, calibration=stored.calibration, resume_note=note,
    )


def stored_offsets(run: Run) -> dict[str, LossTable]:
    """The path losses a run stored when it started (whatever their source), as tables."""
    rows: dict[str, list] = {}
    origins: dict[str, str] = {}
    for offset in sorted(run.offsets, key=lambda o: (o.path, o.freq_hz)):
        rows.setdefault(offset.path, []).append((offset.freq_hz, offset.loss_db))
        origins[offset.path] = offset.origin
    missing = [path for path in ("in1", "in2", "out") if path not in rows]
    if missing:
        raise InputError(f"run {run.guid}: no stored '{missing[0]}' offsets; it cannot be resumed")
    return {path: LossTable.from_rows(path, rows[path], f"run {run.guid} offsets ({origins[path]})") for path in rows}
