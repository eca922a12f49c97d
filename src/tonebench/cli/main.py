"""The tonebench command line."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer
from rich.text import Text

from tonebench.cli.bench import register_bench_commands
from tonebench.cli.bias import register_bias_commands
from tonebench.cli.calibration import cal_app
from tonebench.cli.catalog import register_catalog_commands
from tonebench.cli.common import (
    DbOption,
    configure_logging,
    database,
    err,
    one_line_errors,
    out,
)
from tonebench.cli.progress import StepProgress
from tonebench.cli.queue import register_queue_commands
from tonebench.config.database_location import describe as describe_database
from tonebench.errors import InputError

app = typer.Typer(rich_markup_mode=None, 
    help="Two-tone intercept (IIP3/OIP3) measurements on real or simulated benches, with every point logged.",
    no_args_is_help=True,
    add_completion=False,
)


def _say_version(value: bool) -> None:
    if value:
        from tonebench.version import __version__

        out.print(f"tonebench {__version__}", highlight=False)
        raise typer.Exit()


@app.callback()
def _main(
    version: Annotated[bool, typer.Option("--version", callback=_say_version, is_eager=True,
                                          help="Print the version and exit.")] = False,
    verbose: Annotated[bool, typer.Option("--verbose", "-v",
                                          help="Log what tonebench does, every SCPI command and reply included, "
                                               "on stderr.")] = False,
    trace: Annotated[Path | None, typer.Option("--trace", metavar="FILE",
                                               help="Append every SCPI command and reply, per role and timestamped "
                                                    "(UTC), to FILE. Give it before the command: "
                                                    "tonebench --trace scpi.log bench check -b B")] = None,
) -> None:
    """Two-tone intercept (IIP3/OIP3) measurements on real or simulated benches, with every point logged."""
    with one_line_errors():
        configure_logging(verbose, trace)
sim_app = typer.Typer(rich_markup_mode=None, help="The simulated bench.", no_args_is_help=True)
db_app = typer.Typer(rich_markup_mode=None, help="Database housekeeping.", no_args_is_help=True)
app.add_typer(sim_app, name="sim")
app.add_typer(db_app, name="db")
app.add_typer(cal_app, name="cal")

CalOption = Annotated[
    str | None,
    typer.Option("--cal", help="Calibration set to use (see `tonebench cal list`); default: the bench file's [bench] calibration, else its [offsets]."),
]
register_bench_commands(app)
register_queue_commands(app)
register_catalog_commands(app)

def _warn(message: str) -> None:
    err.print(f"warning: {message}", markup=False, highlight=False)


def _with_progress(start):
    """start(advance) with a progress bar of the measured points."""
    with StepProgress("measuring", "points") as bar:
        return start(bar.advance)


def _run_with_progress(plan: Path, bench: Path, db_url: str, report: Path | None, on_sim_started=None,
                       cal_name: str | None = None, held_at_c: float | None = None):
    from tonebench.run.start import execute_run

    return _with_progress(lambda advance: execute_run(plan, bench, db_url, report, advance, on_sim_started,
                                                      cal_name=cal_name, on_warning=_warn, held_at_c=held_at_c,
                                                      on_estimate=lambda estimate: out.print(estimate.line(),
                                                                                             highlight=False)))


# Exit codes of a run that ended without an exception (README, "Exit codes").
EXIT_FAILED, EXIT_PAUSED, EXIT_POINTS_FAILED = 1, 3, 4


def outcome_exit_code(outcome) -> int:
    """0 complete; 1 aborted, failed with no point measured, or a source not confirmed off;
    3 paused; 4 finished with some points failed (the measured ones analysed)."""
    if not outcome.rf_confirmed:
        return EXIT_FAILED
    if outcome.status == "complete":
        return 0
    if outcome.status == "paused":
        return EXIT_PAUSED
    if outcome.status == "failed" and outcome.points_measured:
        return EXIT_POINTS_FAILED
    return EXIT_FAILED


def _say_outcome(outcome) -> None:
    """The run's end in a few lines: status and reason, how RF went off, where things are."""
    from tonebench.report.terminal import styled

    out.print(Text.assemble(f"run {outcome.guid}: ", styled(outcome.status),
                            f": {outcome.reason}" if outcome.reason else ""))
    if outcome.rf_off:
        if outcome.rf_confirmed:
            out.print(outcome.rf_off, highlight=False)
        else:
            err.print(f"DANGER: {outcome.rf_off}", markup=False, highlight=False)
    out.print(f"database: {describe_database(outcome.db_url)}", highlight=False)
    if outcome.calibration:
        out.print(f"calibration: {outcome.calibration}", highlight=False)
    if outcome.bench_time is not None:
        out.print(outcome.bench_time.line(), highlight=False)
    if outcome.report_path is not None:
        out.print(f"report:   {outcome.report_path}")
        _print_results(outcome.results)
    code = outcome_exit_code(outcome)
    if outcome.status != "complete":
        out.print(f"see `tonebench show {outcome.guid[:8]}`; continue with `tonebench resume {outcome.guid[:8]}`",
                  highlight=False)
    if code:
        raise typer.Exit(code)


def _print_results(results) -> None:
    from tonebench.report.run_views import results_table

    if results:
        out.print(results_table(results, out))


@app.command()
def run(
    plan: Annotated[Path, typer.Argument(help="Plan file (TOML): device, tone frequencies, spacings, powers, analyzer settings.")],
    bench: Annotated[Path, typer.Option("--bench", "-b", help="Bench file (TOML): instruments, dialects, path losses, limits.")],
    db: DbOption = None,
    report: Annotated[Path | None, typer.Option(help="Write the HTML report here (default: report-<run>.html beside the database).")] = None,
    cal: CalOption = None,
    dry_run: Annotated[bool, typer.Option("--dry-run", help="Check the plan against the bench files and print each point's settings and the bench time; connect nothing, write nothing.")] = False,
) -> None:
    """Measure a plan on a bench, store every point, fit intercepts and write a report."""
    with one_line_errors():
        db_url = database(db)
        if dry_run:
            _dry_run(plan, bench, db_url, cal)
            return
        outcome = _run_with_progress(plan, bench, db_url, report, cal_name=cal)
        _say_outcome(outcome)


def _dry_run(plan_path: Path, bench_path: Path, db_url: str, cal_name: str | None) -> None:
    from tonebench.config.bench_file import load_bench
    from tonebench.config.plan_file import load_plan
    from tonebench.report.terminal import fitted_table
    from tonebench.run.preflight import point_settings, preflight
    from tonebench.store.database import open_database, session_factory

    plan, bench = load_plan(plan_path), load_bench(bench_path)
    sessions = None
    if cal_name or bench.settings.bench.calibration:  # a stored calibration set: read, never written
        sessions = session_factory(open_database(db_url, upgrade=False, read_only=True))
    checked = preflight(plan, bench, sessions, cal_name)
    rows = point_settings(checked)
    priorities = {"Point": 10, "Source 1 dBm": 6, "Source 2 dBm": 5, "Analyzer in dBm": 7, "Atten dB": 8,
                  "RBW Hz": 9, "Sweeps": 8, "Sweep time": 9}
    out.print(fitted_table(out, f"{plan.settings.plan.name} on {bench.settings.bench.name}: {len(rows)} points, "
                                "settings predicted from the expected gain", rows, priorities))
    out.print(checked.estimate().line(), highlight=False)
    out.print("dry run: nothing connected, nothing switched on, nothing written", highlight=False)


@app.command()
def resume(
    run_id: Annotated[str, typer.Argument(metavar="RUN", help="Run GUID or a unique prefix of it.")],
    bench: Annotated[Path | None, typer.Option("--bench", "-b", help="Bench file (default: the one the run started with).")] = None,
    plan: Annotated[Path | None, typer.Option("--plan", help="Plan file to check against the stored plan (it must be identical).")] = None,
    db: DbOption = None,
    report: Annotated[Path | None, typer.Option(help="Write the HTML report here (default: report-<run>.html beside the database).")] = None,
) -> None:
    """Continue an interrupted run: points already stored are kept, failed ones measured again."""
    from tonebench.run.resume import resume_run

    with one_line_errors():
        db_url = database(db)
        outcome = _with_progress(lambda advance: resume_run(run_id, db_url, bench_path=bench, plan_path=plan,
                                                            report_path=report, on_progress=advance))
        _say_outcome(outcome)


@app.command()
def demo(
    out_dir: Annotated[Path, typer.Option("--out", help="Folder for the demo database and report.")] = Path("tonebench-demo"),
) -> None:
    """Run the sample plan on the simulated bench (no hardware) and compare IIP3 with the simulated truth."""
    from tonebench.cli.demo import run_demo

    with one_line_errors():
        run_demo(out_dir, _run_with_progress, out)


def _close_dead_runs(db_url: str) -> None:
    """Runs whose process is gone are closed as aborted before a view shows them (views never write)."""
    from tonebench.store.database import open_database, session_factory
    from tonebench.store.ownership import close_dead_runs

    close_dead_runs(session_factory(open_database(db_url, read_only=True)))


@app.command()
def runs(
    db: DbOption = None,
    limit: Annotated[int, typer.Option("--rows", min=1, help="Show at most this many runs, newest first.")] = 20,
) -> None:
    """List runs, newest first."""
    from tonebench.report.run_views import list_runs
    from tonebench.report.terminal import fitted_table, styled

    with one_line_errors():
        _close_dead_runs(database(db))
        rows = [dict(zip(("Run", "Started (UTC)", "Status", "Device", "Bench", "Points"),
                         (guid[:8], started, styled(status), device, bench_name, points)))
                for guid, started, status, device, bench_name, points in list_runs(database(db), limit)]
        out.print(fitted_table(out, "Runs, newest first", rows,
                               {"Run": 10, "Started (UTC)": 8, "Status": 10, "Device": 9, "Bench": 6, "Points": 5}))


@app.command()
def show(
    run_id: Annotated[str, typer.Argument(metavar="RUN", help="Run GUID or a unique prefix of it.")],
    db: DbOption = None,
) -> None:
    """Show one run: device, bench, instruments, results and events."""
    from tonebench.report.run_views import describe_run

    with one_line_errors():
        _close_dead_runs(database(db))
        describe_run(database(db), run_id, out)


@app.command()
def analyze(
    run_id: Annotated[str | None, typer.Argument(metavar="[RUN]", help="Run GUID or a unique prefix of it.")] = None,
    db: DbOption = None,
    cal: Annotated[str | None, typer.Option("--cal", help="Re-refer the stored raw readings to this calibration set (no measuring).")] = None,
    all_runs: Annotated[bool, typer.Option("--all", help="Every finished run (or those of --part/--lot), with a progress bar.")] = False,
    parts: Annotated[list[str] | None, typer.Option("--part", help="With --all: only this part number (repeatable).")] = None,
    lots: Annotated[list[str] | None, typer.Option("--lot", help="With --all: only this lot (repeatable).")] = None,
) -> None:
    """Fit intercepts again from the stored points of a run (or of many) and store the results."""
    from tonebench.results.stored_results import analyze_run
    from tonebench.store.database import open_database, session_factory

    with one_line_errors():
        if (run_id is None) == (not all_runs and not parts and not lots):
            raise InputError("analyze: give a RUN, or --all (optionally with --part/--lot), not both")
        sessions = session_factory(open_database(database(db)))
        if run_id is None:
            _analyze_many(sessions, cal, tuple(parts or ()), tuple(lots or ()))
            return
        results = analyze_run(sessions, run_id, cal)
        if cal:
            out.print(f"results referred to calibration set {cal}", highlight=False)
        _print_results(results)


def _analyze_many(sessions, cal: str | None, parts: tuple[str, ...], lots: tuple[str, ...]) -> None:
    import time

    from tonebench.results.stored_results import analyze_runs, finished_runs

    guids = finished_runs(sessions, parts, lots)
    if not guids:
        out.print("0 runs analysed: no finished run with measured points matches", highlight=False)
        return
    started_s = time.perf_counter()
    with StepProgress("analysing", "runs") as bar:
        results = analyze_runs(sessions, guids, cal, bar.advance)
    took_s = time.perf_counter() - started_s
    out.print(f"{len(guids)} runs analysed in {took_s:.1f} s ({1e3 * took_s / len(guids):.1f} ms per run), "
              f"{results} results stored" + (f", referred to calibration set {cal}" if cal else ""), highlight=False)


@app.command()
def report(
    run_id: Annotated[str, typer.Argument(metavar="RUN", help="Run GUID or a unique prefix of it.")],
    db: DbOption = None,
    out_path: Annotated[Path, typer.Option("--out", help="HTML file to write.")] = Path("tonebench-report.html"),
) -> None:
    """Write a self-contained HTML report (plots and results) for one run; it works offline."""
    from tonebench.report.run_page import write_run_report
    from tonebench.store.database import open_database, session_factory

    with one_line_errors():
        written = write_run_report(session_factory(open_database(database(db), read_only=True)), run_id, out_path)
        out.print(f"report: {written}")


@sim_app.command("serve")
def sim_serve(
    bench: Annotated[Path, typer.Option("--bench", "-b", help="Simulated bench file (TOML with a [simulation] table).")],
) -> None:
    """Serve the simulated instruments as raw-SCPI sockets on loopback until Ctrl-C."""
    import signal
    import threading

    from tonebench.config.bench_file import load_bench
    from tonebench.sim.launch import start_sim_bench

    with one_line_errors():
        loaded = load_bench(bench)
        if loaded.scenario is None:
            raise InputError(f"bench file {bench}: no [simulation] table; only a simulated bench can be served")
        with start_sim_bench(loaded.scenario) as sim:
            for role, resource in sim.resources.items():
                out.print(f"{role}: {resource}", highlight=False)
            out.print("serving; Ctrl-C stops", highlight=False)
            out.file.flush()
            # SIGTERM stops it as cleanly as Ctrl-C: a server started in the background ignores SIGINT.
            stop = threading.Event()
            previous = signal.signal(signal.SIGTERM, lambda signum, frame: stop.set())
            try:
                stop.wait()
            except KeyboardInterrupt:
                pass
            finally:
                signal.signal(signal.SIGTERM, previous)


@db_app.command("upgrade")
def db_upgrade(db: DbOption = None) -> None:
    """Bring a database to this version's schema (also done automatically when it is opened)."""
    from tonebench.store.database import upgrade_database

    with one_line_errors():
        out.print(f"database at schema revision {upgrade_database(database(db))}")


register_bias_commands(app, _run_with_progress)
