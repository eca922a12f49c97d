"""Run a plan on a bench from start to stored results: the one place the layers meet."""

from __future__ import annotations

import signal
import threading
from collections.abc import Callable, Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass
from pathlib import Path

from tonebench.bench import open_bench
from tonebench.config.bench_file import LoadedBench, load_bench
from tonebench.config.plan_file import LoadedPlan, load_plan
from tonebench.offsets import LossTable
from tonebench.plan import expand
from tonebench.review import analyze_run, write_run_report
from tonebench.safety import check_plan
from tonebench.sequencer import ProgressCallback, Sequencer
from tonebench.store.database import open_database, session_factory
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


def default_report_path(db_url: str, guid: str) -> Path:
    """Beside an SQLite database file, else in the current folder."""
    from sqlalchemy.engine import make_url

    url = make_url(db_url)
    folder = Path(url.database).resolve().parent if url.get_backend_name() == "sqlite" and url.database else Path.cwd()
    return folder / f"report-{guid[:8]}.html"


def offsets_from_bench(bench: LoadedBench) -> dict[str, LossTable]:
    origin = f"bench file {bench.path}"
    tables = bench.settings.offsets
    return {path: LossTable.from_rows(path, getattr(tables, path), origin) for path in ("in1", "in2", "out")}


def execute_run(
    plan_path: Path,
    bench_path: Path,
    db_url: str,
    report_path: Path | None,
    on_progress: ProgressCallback | None = None,
    on_sim_started: Callable[[object], None] | None = None,
) -> RunOutcome:
    plan: LoadedPlan = load_plan(plan_path)
    bench: LoadedBench = load_bench(bench_path)
    offsets = offsets_from_bench(bench)
    points = expand(plan.settings)

    with ExitStack() as stack:
        sim = None
        if bench.settings.simulated:
            from tonebench.sim.launch import start_sim_bench

            sim = stack.enter_context(start_sim_bench(bench.scenario))
            resources = dict(sim.resources)
            if on_sim_started:
                on_sim_started(sim)
        else:
            resources = {role: entry.resource for role, entry in bench.settings.instruments.items()}

        # Everything that can refuse the plan happens before the database is touched and RF goes on.
        open_instruments = open_bench(bench.settings, resources)
        stack.callback(open_instruments.close)
        check_plan(
            points,
            offsets,
            bench.settings.limits,
            open_instruments.source_ranges,
            open_instruments.analyzer.limits.get("damage_dbm"),
            f"plan {plan_path}",
        )
        engine = open_database(db_url)
        stack.callback(engine.dispose)
        sessions = session_factory(engine)

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
            metadata={"plan_file": str(plan_path), "bench_file": str(bench_path), "points_planned": len(points)},
        )
        sequencer = Sequencer(open_instruments, offsets, bench.settings.limits, plan.settings.analyzer, recorder)
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
        return RunOutcome(recorder.guid, "complete", db_url, written, results)
