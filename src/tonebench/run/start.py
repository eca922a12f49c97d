"""Run a plan on a bench from start to stored results: the one place the layers meet."""

from __future__ import annotations

import sys
import threading
from collections.abc import Callable
from contextlib import ExitStack
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy.orm import sessionmaker

from tonebench.instruments.open_bench import OpenBench, bench_freq_ranges, open_bench
from tonebench.store.bench_lock import check_free as check_bench_free
from tonebench.store.bench_lock import check_free_at as check_bench_free_at
from tonebench.store.bench_lock import hold_bench
from tonebench.calibration.leveling import Leveler
from tonebench.planes.referral import check_coverage
from tonebench.calibration.sets import CalibrationView, bench_file_set, load_set
from tonebench.config.bench_file import LoadedBench, load_bench
from tonebench.config.plan_file import LoadedPlan, load_plan, plan_from_text
from tonebench.errors import InputError, InstrumentError
from tonebench.instruments.scpi import LimitError, identity
from tonebench.instruments.supervision import InstrumentEvent, RecoveryStopped, RetryPolicy, Supervision
from tonebench.planes.loss_table import LossTable
from tonebench.plan.points import PlannedPoint, expand
from tonebench.report.run_report import check_report_path
from tonebench.store.ownership import (
    Heartbeat,
    check_resumable,
    close_dead_runs,
    process_owner,
    stored_points,
    take_ownership,
)
from tonebench.report.run_page import write_run_report
from tonebench.results.stored_results import analyze_run
from tonebench.store.lookups import find_run
from tonebench.instruments.rf_guard import (
    SIGINT_EXIT,
    SIGTERM_EXIT,
    RfOffReport,
    Terminated,
    attach_note,
    shielded,
    stop_signals,
)
from tonebench.run.event_log import RunLog, log_path_for
from tonebench.plan.limits import check_plan, check_plan_frequencies, power_guard
from tonebench.run.sequencer import ProgressCallback, RunStopped, Sequencer
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import Run
from tonebench.store.records import RunRecorder
from tonebench.run.watchdog import Watchdog, WatchdogTripped
from tonebench.queue.worker import JobCancelled


# Ctrl-C and SIGTERM raise once while a run goes on; the name is kept for callers of old.
sigterm_raises = stop_signals


@dataclass
class RunOutcome:
    """How a run ended. status: complete (every point measured), failed (points failed; the
    measured ones analysed), paused or aborted (by the failure policy or the watchdog)."""

    guid: str
    status: str
    db_url: str
    report_path: Path | None
    results: list
    calibration: str | None = None  # the calibration set's name
    reason: str = ""  # the stored end reason
    rf_off: str | None = None  # how RF went off: "RF off at source1, source2 (read back)"
    rf_confirmed: bool = True  # False when a source could not be read back off
    points_measured: int = 0
    points_failed: int = 0


def default_report_path(db_url: str, guid: str) -> Path:
    """Beside an SQLite database file, else in the current folder."""
    from sqlalchemy.engine import make_url

    url = make_url(db_url)
    folder = Path(url.database).resolve().parent if url.get_backend_name() == "sqlite" and url.database else Path.cwd()
    return folder / f"report-{guid[:8]}.html"


def offsets_from_bench(bench: LoadedBench) -> dict[str, LossTable]:
    origin = f"bench file {bench.path}"
    tables = bench.settings.offsets
    if tables is None:
        raise InputError(
            f"bench file {bench.path}: no [offsets] table and no calibration set; add [offsets], set "
            "[bench] calibration or pass --cal NAME (see `tonebench cal list`)"
        )
    return {path: LossTable.from_rows(path, getattr(tables, path), origin) for path in ("in1", "in2", "out")}


def analyzer_figures(open_instruments) -> dict:
    """What the analysis needs to know of the analyzer, kept with the run so a later `analyze`
    judges the readings by the instrument that took them: its mixer TOI, noise floor, relative
    level accuracy (dialect [performance], bench-file overrides) and mixer limit."""
    analyzer = open_instruments.analyzer
    figures = {key: analyzer.performance[key] for key in ("mixer_toi_dbm", "danl_dbm_per_hz", "level_accuracy_db")
               if key in analyzer.performance}
    if "max_mixer_dbm" in analyzer.limits:
        figures["max_mixer_dbm"] = analyzer.limits["max_mixer_dbm"]
    return figures


def _print_warning(message: str) -> None:
    print(f"warning: {message}", file=sys.stderr, flush=True)


@dataclass
class ChosenCalibration:
    """The path losses a run uses; view is None for a bench file's [offsets]."""

    tables: dict[str, LossTable]
    view: CalibrationView | None
    stale_message: str | None = None


def choose_calibration(bench: LoadedBench, cal_name: str | None, sessions: sessionmaker | None,
                       points: list, plan_origin: str) -> ChosenCalibration:
    """The named set (refused when expired or not covering the plan), else the bench file's [offsets]."""
    pairs = sorted({(p.f1_hz, p.f2_hz) for p in points})
    if cal_name is None:
        tables = offsets_from_bench(bench)
        check_coverage(tables, pairs, f"{plan_origin}: bench file {bench.path} [offsets]")
        return ChosenCalibration(tables, None)
    with sessions() as session:
        view = load_set(session, cal_name)
    status = view.status()
    if status == "expired":
        raise InputError(
            f"{view.label}: expired on {view.expired_at:%Y-%m-%d %H:%M} UTC; measure or import a new set"
        )
    check_coverage(view.tables, pairs, f"{plan_origin}: {view.label}")
    message = None
    if status == "stale":
        message = (
            f"{view.label} is {view.age_days():.1f} days old, past its validity of {view.valid_days:g} days; "
            "the run goes ahead with it"
        )
    return ChosenCalibration(view.tables, view, message)


def make_leveler(bench: LoadedBench, open_instruments, points: list, plan_origin: str) -> Leveler | None:
    """A leveler when the bench has a power meter and leveling is on; checks the meter can read
    every tone at its sweep's highest power (where leveling reads it)."""
    settings = bench.settings.leveling
    meter = open_instruments.power_meter
    if meter is None or not settings.enabled:
        return None
    for point in points:
        for freq_hz in (point.f1_hz, point.f2_hz):
            if not meter.min_freq_hz <= freq_hz <= meter.max_freq_hz:
                raise InputError(
                    f"{plan_origin}: tone {freq_hz:.6g} Hz outside the power meter's {meter.min_freq_hz:.6g}.."
                    f"{meter.max_freq_hz:.6g} Hz; set [leveling] enabled = false to run without leveling"
                )
    tops: dict[tuple, float] = {}
    for point in points:
        key = (point.center_hz, point.spacing_hz, point.bias_v)
        tops[key] = max(tops.get(key, point.tone_dbm), point.tone_dbm)
    for (center_hz, _, _), top_dbm in tops.items():
        if not meter.min_power_dbm <= top_dbm <= meter.max_power_dbm:
            raise InputError(
                f"{plan_origin}: leveling reads each tone at its sweep's highest power, {top_dbm:.2f} dBm at "
                f"{center_hz:.6g} Hz; the power meter reads {meter.min_power_dbm:.2f} to {meter.max_power_dbm:.2f} dBm "
                "(or set [leveling] enabled = false)"
            )
    return Leveler(meter, settings.tolerance_db, settings.max_iterations, settings.max_correction_db)


def _bench_file_set_id(sessions, bench: LoadedBench, bench_path: Path, offsets) -> int:
    """The bench file's [offsets] set, created if new. On SQLite a transaction that read before it
    writes is refused at once ("database is locked", busy timeout or not) while another process
    holds the write lock (a second run starting on the same bench takes it): try again, bounded."""
    from sqlalchemy.exc import OperationalError

    for attempt in range(20):
        try:
            with sessions.begin() as session:
                return bench_file_set(session, bench.settings.bench.name, str(bench_path), offsets)
        except OperationalError as exc:
            if "locked" not in str(exc) or attempt == 19:
                raise
            threading.Event().wait(0.05 * (attempt + 1))
    raise AssertionError("unreachable")


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
) -> RunOutcome:
    """Measure a plan on a bench. cal_name picks a calibration set (else the bench file's
    [bench] calibration, else its [offsets]); on_warning gets warnings before the run starts
    (default: one line on stderr); on_run_started gets the run's GUID once it is stored.

    A run stopped by the bench file's on_point_failure policy or by the watchdog returns with
    status 'paused' or 'aborted' (RF off, the reason stored); Ctrl-C, SIGTERM and errors raise."""
    if report_path is not None:  # refused before the database is written and RF goes on
        check_report_path(report_path)
    plan: LoadedPlan = load_plan(plan_path)
    bench: LoadedBench = load_bench(bench_path)
    points = expand(plan.settings)
    cal_name = cal_name or bench.settings.bench.calibration
    plan_origin = f"plan {plan_path}"
    warn = on_warning or _print_warning

    with ExitStack() as stack:
        engine = sessions = None
        if cal_name is not None:
            # Read only: the set is looked up before anything can be written.
            engine = open_database(db_url)
            stack.callback(engine.dispose)
            sessions = session_factory(engine)
        chosen = choose_calibration(bench, cal_name, sessions, points, plan_origin)
        offsets = chosen.tables
        if chosen.stale_message:
            warn(chosen.stale_message)

        # Everything that can refuse the plan happens before the database is written and RF goes on.
        check_plan_frequencies(points, plan.settings, bench.settings, bench_freq_ranges(bench.settings), plan_origin)
        check_bench_free_at(db_url, sessions, bench.settings.bench.name)  # before talking to its instruments
        open_instruments, relay, supervision = connect_bench(stack, bench, on_sim_started, warn)
        check_plan(
            points,
            offsets,
            bench.settings.limits,
            open_instruments.source_ranges,
            open_instruments.analyzer.limits.get("damage_dbm"),
            plan_origin,
        )
        leveler = make_leveler(bench, open_instruments, points, plan_origin)
        if engine is None:
            engine = open_database(db_url)
            stack.callback(engine.dispose)
            sessions = session_factory(engine)

        if chosen.view is None:
            set_id = _bench_file_set_id(sessions, bench, bench_path, offsets)
        else:
            set_id = chosen.view.id
        device = plan.settings.device.model_dump()
        hold = stack.enter_context(hold_bench(sessions, bench.settings.bench.name))  # one run per bench
        recorder = RunRecorder.start(
            hold.sessions,
            bench_name=bench.settings.bench.name,
            bench_description=bench.settings.bench.description,
            device=device,
            plan_name=plan.settings.plan.name,
            plan_text=plan.text,
            plan_sha256=plan.sha256,
            simulated=bench.settings.simulated,
            instruments=[
                {"role": i.role, "resource": i.resource, "dialect": i.dialect, "idn": i.idn}
                for i in open_instruments.instruments
            ],
            offsets=[
                {"path": table.path, "freq_hz": float(f), "loss_db": float(l), "origin": table.origin}
                for table in offsets.values()
                for f, l in zip(table.freqs_hz, table.losses_db)
            ],
            metadata={
                "plan_file": str(plan_path), "bench_file": str(bench_path), "points_planned": len(points),
                "leveling": leveler is not None,
                "analyzer": analyzer_figures(open_instruments),
            },
        )
        recorder = hold.commit(recorder)
        with sessions.begin() as session:
            session.get(Run, recorder.run_id).calibration_set_id = set_id
        if chosen.stale_message:
            recorder.event("warning", "calibration-stale", chosen.stale_message, {"calibration_set_id": set_id})
        log = RunLog(recorder, log_path_for(db_url))
        log.line("info", "run-start", f"run {recorder.guid} started: plan {plan.settings.plan.name}, "
                                      f"bench {bench.settings.bench.name}, {len(points)} points")
        return drive(Drive(
            recorder=recorder, log=log, sessions=sessions, bench=bench, plan=plan, points=points,
            done_keys=frozenset(), offsets=offsets, instruments=open_instruments, supervision=supervision,
            relay=relay, leveler=leveler, db_url=db_url, report_path=report_path,
            calibration=None if chosen.view is None else chosen.view.name,
        ), on_progress, on_run_started)


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
        with sessions() as session:
            run = find_run(session, ident)
            states = stored_points(session, run.id)
            check_resumable(run, sum(1 for status in states.values() if status == "failed"))
            guid, run_id, bench_name = run.guid, run.id, run.bench.name
            plan_text, plan_sha256 = run.plan.text, run.plan.sha256
            metadata = dict(run.metadata_json or {})
            stored_ids = {inst.role: inst.idn for inst in run.instruments}
            offsets = stored_offsets(run)
            calibration = run.calibration_set.name if run.calibration_set is not None else None
        if plan_path is not None:
            given = load_plan(plan_path)
            if given.sha256 != plan_sha256:
                raise InputError(
                    f"plan {plan_path} differs from the plan run {guid} started with (sha256 {given.sha256[:12]} "
                    f"vs {plan_sha256[:12]}); a resume measures the same plan"
                )
        plan = plan_from_text(plan_text, Path(metadata.get("plan_file", "stored plan")), f"run {guid} stored plan")
        bench_path = Path(bench_path or metadata.get("bench_file", ""))
        bench = load_bench(bench_path)
        if bench.settings.bench.name != bench_name:
            raise InputError(
                f"bench file {bench_path} is for bench {bench.settings.bench.name!r}; run {guid} was measured "
                f"on {bench_name!r}"
            )
        points = expand(plan.settings)
        done_keys = frozenset(key for key, status in states.items() if status == "measured")
        remaining = [point for point in points if point.key not in done_keys]
        plan_origin = f"run {guid} plan"
        check_plan_frequencies(remaining, plan.settings, bench.settings, bench_freq_ranges(bench.settings),
                               plan_origin)
        check_bench_free(sessions, bench_name, except_run_id=run_id)  # before talking to its instruments

        open_instruments, relay, supervision = connect_bench(stack, bench, on_sim_started, on_warning)
        check_same_instruments(guid, stored_ids, open_instruments)
        check_plan(remaining, offsets, bench.settings.limits, open_instruments.source_ranges,
                   open_instruments.analyzer.limits.get("damage_dbm"), plan_origin)
        leveler = make_leveler(bench, open_instruments, points, plan_origin)
        stack.enter_context(hold_bench(sessions, bench_name, resume_run_id=run_id))  # one run per bench

        recorder = RunRecorder(sessions, run_id, guid)
        log = RunLog(recorder, log_path_for(db_url))
        failed_before = sum(1 for key, status in states.items() if status == "failed")
        again = f", {failed_before} of them failed before" if failed_before else ""
        note = f"resumed by {process_owner()}: {len(done_keys)} already stored, {len(remaining)} to measure{again}"
        return drive(Drive(
            recorder=recorder, log=log, sessions=sessions, bench=bench, plan=plan, points=points,
            done_keys=done_keys, offsets=offsets, instruments=open_instruments, supervision=supervision,
            relay=relay, leveler=leveler, db_url=db_url, report_path=report_path, calibration=calibration,
            resume_note=note,
        ), on_progress, on_run_started)


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


def check_same_instruments(guid: str, stored_ids: dict[str, str], bench: OpenBench) -> None:
    """A resumed run must be measured with the instruments it started with (maker, model, serial)."""
    now = {info.role: info.idn for info in bench.instruments}
    if set(now) != set(stored_ids):
        raise InputError(
            f"run {guid} was measured with {', '.join(sorted(stored_ids))}; the bench now has {', '.join(sorted(now))}"
        )
    for role, idn in stored_ids.items():
        if identity(now[role]) != identity(idn):
            raise InputError(f"run {guid}: {role} was {idn!r}; the bench now has {now[role]!r}")


class EventRelay:
    """The instruments' event callback: events held until the run's log exists, then passed on."""

    def __init__(self):
        self.log: RunLog | None = None
        self._early: list[InstrumentEvent] = []

    def __call__(self, event: InstrumentEvent) -> None:
        if self.log is None:
            self._early.append(event)
        else:
            self.log.instrument_event(event)

    def attach(self, log: RunLog) -> None:
        self.log = log
        for event in self._early:
            log.instrument_event(event)
        self._early.clear()


def connect_bench(stack: ExitStack, bench: LoadedBench, on_sim_started,
                  warn: Callable[[str], None] | None = None) -> tuple[OpenBench, EventRelay, Supervision]:
    """Start the simulator for a simulated bench, then open every instrument under supervision
    and switch RF off at every source (an earlier command killed with RF on is said in an event
    and a warning); both are closed when `stack` unwinds."""
    if bench.settings.simulated:
        from tonebench.sim.launch import start_sim_bench

        sim = stack.enter_context(start_sim_bench(bench.scenario))
        resources = dict(sim.resources)
        if on_sim_started:
            on_sim_started(sim)
    else:
        resources = {role: entry.resource for role, entry in bench.settings.instruments.items()}
    relay = EventRelay()
    supervision = supervision_for(bench, relay)
    open_instruments = open_bench(bench.settings, resources, supervision)
    stack.callback(open_instruments.close)
    open_instruments.rf_off_budget_s = bench.settings.unattended.rf_off_s
    for line in open_instruments.switch_off_at_connect():
        relay(InstrumentEvent(line.split(" ", 1)[0], "rf-found-on", "warning", line))
        (warn or _print_warning)(line)
    return open_instruments, relay, supervision


def supervision_for(bench: LoadedBench, relay: EventRelay) -> Supervision:
    settings = bench.settings.unattended
    policy = RetryPolicy(retries=settings.retries, reconnects=settings.reconnects, backoff_s=settings.backoff_s,
                         max_backoff_s=max(5.0, settings.backoff_s))
    return Supervision(policy, relay)


@dataclass
class Drive:
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


def watchdog_seconds(run: Drive, sequencer: Sequencer) -> float:
    """The bench file's watchdog_s, raised if one sweep may legitimately take longer (narrow RBW)."""
    analyzer = run.instruments.analyzer
    longest_wait_s = 2 * analyzer.predicted_sweep_time_s(sequencer.setup) + analyzer.instrument.dialect.io.query_timeout_s
    return max(run.bench.settings.unattended.watchdog_s, 2 * longest_wait_s)


def drive(run: Drive, on_progress: ProgressCallback | None, on_run_started: Callable[[str], None] | None) -> RunOutcome:
    """Measure what is left of the run with supervision, the run-time power guard and the
    watchdog; store the end truthfully; analyze and report the measured points.

    Ctrl-C and SIGTERM raise once (later signals cannot interrupt the cleanup); RF goes off in
    the sequencer's `finally`, confirmed by read-back, before the run's end is stored."""
    recorder, log, bench = run.recorder, run.log, run.bench
    with stop_signals():
        take_ownership(run.sessions, recorder.run_id, resuming=run.resume_note is not None)
        if run.resume_note is not None:
            log.event("info", "resume", run.resume_note, {"done": len(run.done_keys),
                                                          "remaining": len(run.points) - len(run.done_keys)})
        run.relay.attach(log)
        if on_run_started:
            on_run_started(recorder.guid)
        guard = power_guard(run.offsets, bench.settings.limits, run.instruments.analyzer.limits.get("damage_dbm"))
        for source in run.instruments.sources():
            source.power_guard = guard
        sequencer = Sequencer(run.instruments, run.offsets, bench.settings.limits, run.plan.settings.analyzer,
                              recorder, run.leveler, second_order=run.plan.settings.sweep.second_order,
                              unattended=bench.settings.unattended, log=log)
        watchdog = Watchdog(watchdog_seconds(run, sequencer), lambda reason: _trip(run, reason))
        sequencer.watchdog = watchdog
        run.supervision.on_activity = watchdog.kick
        heartbeat = Heartbeat(run.sessions, recorder.run_id)

        def progress(done: int, total: int) -> None:
            heartbeat.beat()
            if on_progress:
                on_progress(done, total)

        try:
            with watchdog:
                sequencer.run(run.points, progress, run.done_keys)
        except RunStopped as stop:
            return _stopped(run, sequencer.rf_report, stop.status, str(stop))
        except (KeyboardInterrupt, Terminated) as exc:
            _interrupted(run, sequencer.rf_report, exc)
            raise
        except Exception as exc:
            if watchdog.tripped is not None and isinstance(exc, (WatchdogTripped, RecoveryStopped, InstrumentError)):
                return _stopped(run, sequencer.rf_report, "aborted", watchdog.tripped)
            _failed(run, sequencer.rf_report, exc)
            raise
        return _measured(run, sequencer)


def _trip(run: Drive, reason: str) -> None:
    """The watchdog's action, in its own thread: stop recovery, RF off by any connection, retried
    until read back off (or the time allowed is spent)."""
    run.supervision.stop.set()  # no more retries, and no source turns RF on again
    report = run.instruments.force_rf_off_all()
    run.log.event("error", "watchdog", f"{reason}; {report.line()}")


def _rf_said(report: RfOffReport | None) -> RfOffReport:
    """The sequencer's RF-off report; a run that never got there has one saying so."""
    if report is not None:
        return report
    return RfOffReport(unconfirmed={"source1": "RF off not attempted", "source2": "RF off not attempted"})


def _finish(run: Drive, status: str, reason: str, report: RfOffReport) -> str:
    """Store the run's end (shielded from signals); a source not confirmed off is part of it."""
    if not report.ok:
        reason = f"{reason}; {report.line()}"
    with shielded():
        run.recorder.finish(status, reason)
        run.log.line("info" if status == "complete" else "error", "run-end", f"run {status}: {reason}")
    return reason


def _stopped(run: Drive, report: RfOffReport | None, status: str, reason: str) -> RunOutcome:
    """Paused or aborted by the failure policy or the watchdog: RF off, the reason stored."""
    report = _rf_said(report)
    reason = _finish(run, status, reason, report)
    return RunOutcome(run.recorder.guid, status, run.db_url, None, [], run.calibration, reason=reason,
                      rf_off=report.line(), rf_confirmed=report.ok)


def _interrupted(run: Drive, report: RfOffReport | None, exc: BaseException) -> None:
    """Ctrl-C or SIGTERM: the run stored as aborted, and the one line the command line prints."""
    what = "terminated by SIGTERM" if isinstance(exc, Terminated) else "interrupted by Ctrl-C"
    report = _rf_said(report)
    _finish(run, "aborted", what, report)
    short = run.recorder.guid[:8]
    code = (SIGTERM_EXIT if isinstance(exc, Terminated) else SIGINT_EXIT) if report.ok else 1
    attach_note(exc, f"{what}: {report.line()}; run {short} stored as aborted; `tonebench resume {short}` "
                     "continues it", code)


def _failed(run: Drive, report: RfOffReport | None, exc: Exception) -> None:
    """An error ended the run: stored as aborted (refused at run time, cancelled) or failed."""
    report = _rf_said(report)
    if isinstance(exc, LimitError):
        run.log.event("error", "limit-refused", str(exc))
        _finish(run, "aborted", f"refused at run time: {exc}", report)
    elif isinstance(exc, JobCancelled):
        _finish(run, "aborted", str(exc), report)
    else:
        _finish(run, "failed", f"{type(exc).__name__}: {exc}", report)
    if not report.ok:
        attach_note(exc, f"error: {exc}; {report.line()}", 1)


def _measured(run: Drive, sequencer: Sequencer) -> RunOutcome:
    """Every point was tried: 'complete' only when every one was measured; 'failed' otherwise,
    with the measured ones (if any) analysed and reported."""
    report = _rf_said(sequencer.rf_report)
    total, failed = len(run.points), len(sequencer.failed_keys)
    measured = total - failed
    again = "reasons stored with the points; `tonebench resume` measures them again"
    if failed == 0:
        status, reason = "complete", f"all {total} points measured"
    elif measured == 0:
        status, reason = "failed", f"no point measured: all {total} failed ({again})"
    else:
        status, reason = "failed", f"{measured} of {total} points measured, {failed} failed ({again})"
    reason = _finish(run, status, reason, report)
    outcome = RunOutcome(run.recorder.guid, status, run.db_url, None, [], run.calibration, reason=reason,
                         rf_off=report.line(), rf_confirmed=report.ok, points_measured=measured,
                         points_failed=failed)
    if measured:
        outcome.results = analyze_run(run.sessions, run.recorder.guid)
        outcome.report_path = write_run_report(run.sessions, run.recorder.guid,
                                               run.report_path or default_report_path(run.db_url, run.recorder.guid))
    return outcome
