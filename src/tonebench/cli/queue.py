"""Queue commands: add a plan to a bench's queue, list, cancel, and run a worker."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Annotated

import typer
from rich.text import Text

from tonebench.cli.common import DbOption, database, err, one_line_errors, out
from tonebench.cli.progress import StepProgress


def _sessions(db: str | None, read_only: bool = False):
    from tonebench.store.database import open_database, session_factory

    return session_factory(open_database(database(db), read_only=read_only))


def register_queue_commands(app: typer.Typer) -> None:
    """Add the queue and worker commands to the main app."""
    queue_app = typer.Typer(rich_markup_mode=None, help="Plans waiting for a bench: add, list, cancel.", no_args_is_help=True)
    app.add_typer(queue_app, name="queue")
    _register_job_commands(queue_app)
    _register_worker_command(app)


def _register_job_commands(queue_app: typer.Typer) -> None:
    @queue_app.command("add")
    def queue_add(
        plan: Annotated[Path, typer.Argument(help="Plan file (TOML).")],
        bench: Annotated[Path, typer.Option("--bench", "-b", help="Bench file (TOML) of the bench that should run it.")],
        priority: Annotated[int, typer.Option(help="Higher runs first; equal priorities run in the order queued.")] = 0,
        db: DbOption = None,
    ) -> None:
        """Check a plan against a bench's limits and queue it for that bench's worker."""
        from tonebench.queue.jobs import add_job

        with one_line_errors():
            job, estimate = add_job(_sessions(db), plan, bench, priority)
            out.print(f"job {job.guid} queued for bench {job.bench_name}: {job.plan_name}", highlight=False)
            out.print(estimate.line(), highlight=False)

    @queue_app.command("list")
    def queue_list(
        bench: Annotated[str | None, typer.Option("--bench", "-b", help="Only this bench (its name).")] = None,
        all_jobs: Annotated[bool, typer.Option("--all", help="Finished and cancelled jobs too.")] = False,
        db: DbOption = None,
    ) -> None:
        """List jobs in the order workers take them."""
        from tonebench.queue.jobs import list_jobs
        from tonebench.report.terminal import fitted_table, styled

        with one_line_errors():
            rows = [{"Job": job.guid[:8], "Bench": job.bench_name, "Plan": job.plan_name, "Status": styled(job.status),
                     "Prio": str(job.priority), "Queued (UTC)": f"{job.created_at:%Y-%m-%d %H:%M}",
                     "Worker": job.claimed_by or "", "Run": (job.run_guid or "")[:8], "Note": job.message or ""}
                    for job in list_jobs(_sessions(db, read_only=True), bench, all_jobs)]
            out.print(fitted_table(out, "Jobs, in the order workers take them", rows,
                                   {"Job": 10, "Bench": 7, "Plan": 8, "Status": 10, "Prio": 4, "Queued (UTC)": 5,
                                    "Worker": 2, "Run": 6, "Note": 1}, wrapping=("Note",)))

    @queue_app.command("cancel")
    def queue_cancel(
        job: Annotated[str, typer.Argument(metavar="JOB", help="Job GUID or a unique prefix of it.")],
        db: DbOption = None,
    ) -> None:
        """Cancel a queued job; a running one is stopped after its current point (RF off)."""
        from tonebench.queue.jobs import cancel_job

        with one_line_errors():
            cancelled = cancel_job(_sessions(db), job)
            out.print(f"job {cancelled.guid}: {cancelled.message}", highlight=False)


def _register_worker_command(app: typer.Typer) -> None:
    @app.command("worker")
    def worker(
        bench: Annotated[Path, typer.Option("--bench", "-b", help="Bench file (TOML) of the bench this worker drives.")],
        db: DbOption = None,
        until_empty: Annotated[bool, typer.Option("--until-empty", help="Stop when no job is queued instead of waiting for more.")] = False,
        poll_s: Annotated[float, typer.Option("--poll-s", min=0.1, help="Seconds between looks at an empty queue.")] = 5.0,
        report_dir: Annotated[Path | None, typer.Option("--reports", help="Folder for the HTML reports (default: beside the database).")] = None,
    ) -> None:
        """Run the queued jobs of one bench, one after another, unattended (Ctrl-C or SIGTERM stops)."""
        from tonebench.queue.worker import Worker

        with one_line_errors(), StepProgress("measuring", "points", transient=True) as bar:
            def say_job(what: str, job, detail: str) -> None:
                if what in ("start", "resume"):
                    bar.restart()
                _say_job(what, job, detail)

            unit = Worker(database(db), bench, on_job=say_job, on_progress=bar.advance, poll_s=poll_s,
                          report_dir=report_dir)
            count, termed = _work(unit, until_empty)
            bar.stop()
            out.print(f"{_now()} worker for bench {unit.bench_name}: {count} job(s) run", highlight=False)
            if termed:  # SIGTERM between runs: a clean stop, with SIGTERM's exit code all the same
                err.print("worker stopped by SIGTERM between runs", markup=False, highlight=False)
                raise typer.Exit(143)


def _now() -> str:
    return dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%SZ")


def _say_job(what: str, job, detail: str) -> None:
    """One line per job event, timestamped (UTC), the outcome word in colour."""
    from tonebench.report.terminal import styled

    line = Text.assemble(f"{_now()} job {job.guid[:8]} ({job.plan_name}): ", styled(what),
                         f": {detail}" if detail else "")
    err.print(line, highlight=False)


def _work(unit, until_empty: bool) -> tuple[int, bool]:
    """Run the worker: (jobs run, whether SIGTERM stopped it between runs); a signal during a
    run ends the command with the run's note and exit code."""
    import signal

    from tonebench.instruments.rf_guard import (
        SIGINT_EXIT,
        SIGTERM_EXIT,
        Terminated,
        note_of,
    )

    # Between runs SIGTERM just ends the loop; during a run the runner turns it into an
    # exception so RF goes off first.
    termed = []

    def stop_between_runs(signum, frame) -> None:
        termed.append(signum)
        unit.stop.set()

    previous = signal.signal(signal.SIGTERM, stop_between_runs)
    try:
        count = unit.run(until_empty=until_empty)
    except (KeyboardInterrupt, Terminated) as exc:
        note = note_of(exc)
        code = SIGTERM_EXIT if isinstance(exc, Terminated) else SIGINT_EXIT
        line = f"worker stopped; {note.line}" if note else "worker stopped"
        err.print(line, markup=False, highlight=False)
        raise typer.Exit(note.exit_code if note else code) from None
    finally:
        signal.signal(signal.SIGTERM, previous)
    return count, bool(termed)
