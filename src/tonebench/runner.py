"""Run a plan on a bench from start to stored results: the one place the layers meet."""

from __future__ import annotations

import signal
import sys
import threading
from collections.abc import Callable, Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy.orm import sessionmaker

from tonebench.bench import open_bench
from tonebench.calibration.leveling import Leveler
from tonebench.calibration.referral import check_coverage
from tonebench.calibration.sets import CalibrationView, bench_file_set, load_set
from tonebench.config.bench_file import LoadedBench, load_bench
from tonebench.config.plan_file import LoadedPlan, load_plan
from tonebench.errors import InputError
from tonebench.offsets import LossTable
from tonebench.plan import expand
from tonebench.review import analyze_run, write_run_report
from tonebench.safety import check_plan
from tonebench.sequencer import ProgressCallback, Sequencer
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import Run
from tonebench.store.records import RunRecorder


class Terminated(Exception):
    """Raised in the main thread when the process receives SIGTERM, so RF-off cleanup runs."""


@contextmanager
def sigterm_raises() -> Iterator[None]:
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def _raise(signum, frame):
        raise Terminated("terminated by SIGTERM")

    previous = signal.signal(signal.SIGTERM, _raise)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


@dataclass
class RunOutcome:
    guid: str
    status: str
    db_url: str
    report_path: Path | None
    results: list
    calibration: str | None = None  # the calibration set's name


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
) -> RunOutcome:
    """Measure a plan on a bench. cal_name picks a calibration set (else the bench file's
    [bench] calibration, else its [offsets]); on_warning gets warnings before the run starts
    (default: one line on stderr)."""
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

        sim = None
        if bench.settings.simulated:
            from tonebench.sim.launch import start_sim_bench

            sim = stack.enter_context(start_sim_bench(bench.scenario))
            resources = dict(sim.resources)
            if on_sim_started:
                on_sim_started(sim)
        else:
            resources = {role: entry.resource for role, entry in bench.settings.instruments.items()}

        # Everything that can refuse the plan happens before the database is written and RF goes on.
        open_instruments = open_bench(bench.settings, resources)
        stack.callback(open_instruments.close)
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
            with sessions.begin() as session:
                set_id = bench_file_set(session, bench.settings.bench.name, str(bench_path), offsets)
        else:
            set_id = chosen.view.id
        device = plan.settings.device.model_dump()
        recorder = RunRecorder.start(
            sessions,
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
        with sessions.begin() as session:
            session.get(Run, recorder.run_id).calibration_set_id = set_id
        if chosen.stale_message:
            recorder.event("warning", "calibration-stale", chosen.stale_message, {"calibration_set_id": set_id})
        sequencer = Sequencer(open_instruments, offsets, bench.settings.limits, plan.settings.analyzer, recorder,
                              leveler, second_order=plan.settings.sweep.second_order)
        try:
            with sigterm_raises():
                sequencer.run(points, on_progress)
        except KeyboardInterrupt:
            recorder.finish("aborted", "interrupted by Ctrl-C")
            raise
        except Terminated as exc:
            recorder.finish("aborted", str(exc))
            raise
        except Exception as exc:
            recorder.finish("failed", f"{type(exc).__name__}: {exc}")
            raise
        recorder.finish("complete", f"all {len(points)} points measured")

        results = analyze_run(sessions, recorder.guid)
        written = write_run_report(sessions, recorder.guid, report_path or default_report_path(db_url, recorder.guid))
        return RunOutcome(recorder.guid, "complete", db_url, written, results,
                          None if chosen.view is None else chosen.view.name)
