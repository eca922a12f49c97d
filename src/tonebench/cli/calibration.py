"""`tonebench cal ...`: calibration sets (import, measure, list, show, expire)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from tonebench.cli.common import DbOption, database, one_line_errors, out
from tonebench.cli.progress import StepProgress
from tonebench.units import format_freq

cal_app = typer.Typer(rich_markup_mode=None, help="Calibration sets: path losses and the system residual.", no_args_is_help=True)

NameArg = Annotated[str, typer.Argument(metavar="NAME", help="Calibration set name (letters, digits, '.', '_', '-').")]
BenchOpt = Annotated[Path, typer.Option("--bench", "-b", help="Bench file (TOML).")]
PlanOpt = Annotated[Path, typer.Option("--plan", "-p", help="Plan file (TOML) whose frequencies (and analyzer settings) to calibrate for.")]
ValidOpt = Annotated[float, typer.Option("--valid-days", help="Days the set stays valid; runs warn after that.")]
OperatorOpt = Annotated[str | None, typer.Option("--operator", help="Who made the set (default: the login name).")]
NoteOpt = Annotated[str | None, typer.Option("--note", help="Free text stored with the set.")]
LevelOpt = Annotated[float | None, typer.Option("--level-dbm", help="Source setting during the measurement (default: the bench's max_tone_dbm, at most 0 dBm).")]
StepOpt = Annotated[float | None, typer.Option("--step-hz", help="Also measure on a uniform grid with this step between the plan's lowest and highest frequency.")]
ThruOpt = Annotated[bool, typer.Option("--thru-in-place", help="Confirm a thru is connected in place of the DUT (hardware benches; the simulator does it itself).")]


def _db(db: str | None) -> str:
    return database(db)


def _summary(view) -> None:
    paths = ", ".join(f"{p} {t.freqs_hz.size} points {t.losses_db.min():.2f}..{t.losses_db.max():.2f} dB"
                      for p, t in view.tables.items())
    out.print(f"calibration set {view.name} ({view.method}): {paths}", highlight=False)
    out.print(f"  range {format_freq(view.freq_min_hz)} to {format_freq(view.freq_max_hz)}, valid {view.valid_days:g} days, "
              f"status {view.status()}", highlight=False)
    for r in view.residuals:
        out.print(f"  residual {format_freq(r['center_hz'])} / {format_freq(r['spacing_hz'])} at {r['atten_db']:g} dB: "
                  f"system {_ip3(r['system_ip3_dbm'])}, sources {_ip3(r['source_ip3_dbm'])}, "
                  f"analyzer {_ip3(r['analyzer_ip3_dbm'])}", highlight=False)


def _ip3(value) -> str:
    return "not resolved" if value is None else f"{value:+.2f} dBm"


def _path_files(in1, in2, out_) -> dict:
    return {path: value for path, value in (("in1", in1), ("in2", in2), ("out", out_)) if value}


@cal_app.command("import-table")
def import_table(
    name: NameArg,
    in1: Annotated[Path | None, typer.Option("--loss-in1", help="CSV table (freq_hz,loss_db) for source 1 to the DUT input.")] = None,
    in2: Annotated[Path | None, typer.Option("--loss-in2", help="CSV table for source 2 to the DUT input.")] = None,
    out_: Annotated[Path | None, typer.Option("--loss-out", help="CSV table for the DUT output to the analyzer.")] = None,
    valid_days: ValidOpt = 30.0,
    operator: OperatorOpt = None,
    note: NoteOpt = None,
    db: DbOption = None,
) -> None:
    """Store a new set from CSV tables of loss (positive dB) against frequency."""
    from tonebench.calibration.workflow import default_operator, import_tables

    with one_line_errors():
        view = import_tables(_db(db), name, _path_files(in1, in2, out_), valid_days=valid_days,
                             operator=operator or default_operator(), notes=note)
        _summary(view)


@cal_app.command("import-touchstone")
def import_touchstone(
    name: NameArg,
    in1: Annotated[list[Path] | None, typer.Option("--loss-in1", help="Touchstone 2-port file(s) for source 1 to the DUT input; repeat to cascade in order.")] = None,
    in2: Annotated[list[Path] | None, typer.Option("--loss-in2", help="Touchstone 2-port file(s) for source 2 to the DUT input.")] = None,
    out_: Annotated[list[Path] | None, typer.Option("--loss-out", help="Touchstone 2-port file(s) for the DUT output to the analyzer.")] = None,
    valid_days: ValidOpt = 30.0,
    operator: OperatorOpt = None,
    note: NoteOpt = None,
    db: DbOption = None,
) -> None:
    """Store a new set from Touchstone 2-port files (|S21| in dB); several files per path are cascaded."""
    from tonebench.calibration.workflow import default_operator
    from tonebench.calibration.workflow import import_touchstone as run_import

    with one_line_errors():
        view = run_import(_db(db), name, _path_files(in1, in2, out_), valid_days=valid_days,
                          operator=operator or default_operator(), notes=note)
        _summary(view)


@cal_app.command("measure-input")
def measure_input(
    name: NameArg, bench: BenchOpt, plan: PlanOpt, level_dbm: LevelOpt = None, step_hz: StepOpt = None,
    valid_days: ValidOpt = 30.0, operator: OperatorOpt = None, db: DbOption = None,
) -> None:
    """Measure in1 and in2 with the power meter at the DUT input plane; stores a new set."""
    from tonebench.calibration.workflow import default_operator
    from tonebench.calibration.workflow import measure_input as run_measure

    with one_line_errors():
        with StepProgress("calibrating", "readings") as bar:
            view = run_measure(_db(db), name, bench, plan, level_dbm=level_dbm, step_hz=step_hz,
                               valid_days=valid_days, operator=operator or default_operator(), on_progress=bar.advance)
        _summary(view)


@cal_app.command("measure-output")
def measure_output(
    name: NameArg, bench: BenchOpt, plan: PlanOpt, level_dbm: LevelOpt = None, step_hz: StepOpt = None,
    thru_in_place: ThruOpt = False, db: DbOption = None,
) -> None:
    """Measure 'out' through a thru in place of the DUT, referred to the set's input paths."""
    from tonebench.calibration.workflow import measure_output as run_measure

    with one_line_errors():
        with StepProgress("calibrating", "readings") as bar:
            view = run_measure(_db(db), name, bench, plan, level_dbm=level_dbm, step_hz=step_hz,
                               thru_in_place=thru_in_place, on_progress=bar.advance)
        _summary(view)


@cal_app.command("measure-residual")
def measure_residual(
    name: NameArg, bench: BenchOpt, plan: PlanOpt,
    tone_start_dbm: Annotated[float | None, typer.Option("--tone-start-dbm", help="Lowest tone power at the DUT input plane (default: 15 dB under the top).")] = None,
    tone_stop_dbm: Annotated[float | None, typer.Option("--tone-stop-dbm", help="Highest tone power (default: the most the bench and analyzer allow).")] = None,
    tone_step_db: Annotated[float | None, typer.Option("--tone-step-db", help="Step between tone powers (default 5 dB).")] = None,
    rbw_hz: Annotated[float | None, typer.Option("--rbw-hz", help="RBW for these reads instead of the plan's (span 10 RBW); narrower sees a lower residual.")] = None,
    thru_in_place: ThruOpt = False, db: DbOption = None,
) -> None:
    """Measure the system's own IM3 through a thru, at the plan's attenuation and 10 dB away, per (center, spacing)."""
    from tonebench.calibration.workflow import measure_residual as run_measure

    with one_line_errors():
        with StepProgress("calibrating", "readings") as bar:
            view = run_measure(_db(db), name, bench, plan, start_dbm=tone_start_dbm, stop_dbm=tone_stop_dbm,
                               step_db=tone_step_db, rbw_hz=rbw_hz, thru_in_place=thru_in_place,
                               on_progress=bar.advance)
        _summary(view)


@cal_app.command("list")
def list_sets(db: DbOption = None) -> None:
    """List calibration sets, newest first, with their status (valid, stale or expired)."""
    from tonebench.calibration.sets import list_sets as stored_sets
    from tonebench.report.terminal import fitted_table, styled
    from tonebench.store.database import open_database, session_factory

    with one_line_errors():
        with session_factory(open_database(_db(db), read_only=True))() as session:
            views = stored_sets(session)
        rows = [{"Name": v.name, "Method": v.method, "Created (UTC)": f"{v.created_at:%Y-%m-%d %H:%M}",
                 "Age (days)": f"{v.age_days():.1f}", "Valid (days)": f"{v.valid_days:g}", "Status": styled(v.status()),
                 "Range": f"{format_freq(v.freq_min_hz)} to {format_freq(v.freq_max_hz)}", "Paths": ",".join(v.tables),
                 "Residuals": str(len(v.residuals))} for v in views]
        out.print(fitted_table(out, "Calibration sets", rows,
                               {"Name": 10, "Method": 6, "Created (UTC)": 7, "Age (days)": 5, "Valid (days)": 3,
                                "Status": 10, "Range": 8, "Paths": 2, "Residuals": 1}))


@cal_app.command("show")
def show(
    name: NameArg,
    html_out: Annotated[Path | None, typer.Option("--html", help="Write the offsets plotted against frequency to this HTML file (default: cal-NAME.html).")] = None,
    db: DbOption = None,
) -> None:
    """Show one set: provenance, paths and residual; writes a self-contained HTML page of its offsets."""
    from tonebench.report.calibration_page import write_calibration_page
    from tonebench.calibration.sets import load_set
    from tonebench.store.database import open_database, session_factory

    with one_line_errors():
        with session_factory(open_database(_db(db), read_only=True))() as session:
            view = load_set(session, name)
        _summary(view)
        out.print(f"  created {view.created_at:%Y-%m-%d %H:%M:%S} UTC by {view.operator or '-'}; {view.notes or ''}", highlight=False)
        for inst in view.instruments:
            out.print(f"  {inst.get('step', ''):15} {inst.get('role', ''):11} {inst.get('resource', '')}  {inst.get('idn', '')}",
                      highlight=False)
        for source in view.source_files:
            out.print(f"  file {source.get('file', source.get('plan', ''))} sha256 {source.get('sha256', '')[:16]}", highlight=False)
        written = write_calibration_page(view, html_out or Path(f"cal-{name}.html"))
        out.print(f"page: {written}", highlight=False)


@cal_app.command("expire")
def expire(name: NameArg, db: DbOption = None) -> None:
    """Withdraw a set: runs refuse it from now on; runs that used it keep their record."""
    from tonebench.calibration.sets import expire_set
    from tonebench.store.database import open_database, session_factory

    with one_line_errors():
        with session_factory(open_database(_db(db))).begin() as session:
            when = expire_set(session, name)
        out.print(f"calibration set {name} expired at {when:%Y-%m-%d %H:%M:%S} UTC", highlight=False)
