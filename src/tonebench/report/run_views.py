"""Read-only views of the store for the CLI: the run list and one run in detail.

They never write. A run left 'running' by a process that is gone shows as stored until the
command closes such runs first (store/ownership.close_dead_runs), before it shows the view.
"""

from __future__ import annotations

from rich.console import Console
from rich.table import Table
from rich.text import Text
from sqlalchemy import func, select

from tonebench.report.run_report import flag_text
from tonebench.report.terminal import RESULT_PRIORITIES, fitted_table, styled, terminal_row
from tonebench.store.database import open_database, session_factory
from tonebench.store.lookups import find_run
from tonebench.store.models import CalibrationSet, Point, PointFlag, Run
from tonebench.plan.axes import point_name_of_key

MAX_FAILED_SHOWN = 10  # failed points listed by `show`; the rest are counted


def results_table(results, console: Console) -> Table:
    """Stored results as a compact terminal table at the console's width; optional columns only
    when some sweep has something in them."""
    rows = [terminal_row(r) for r in results]
    shown = {"Note": any(row["Note"] for row in rows), "Flags": any(row["Flags"] != "-" for row in rows),
             "Gate V": any(row["Gate V"] for row in rows), "degC": any(row["degC"] for row in rows),
             "LO dBm": any(row["LO dBm"] for row in rows),
             "Verdict": any(r.verdict not in (None, "no-limit") for r in results)}
    rows = [{c: cell for c, cell in row.items() if shown.get(c, True)} for row in rows]
    return fitted_table(console, "Results (dB, dBm; IIP3 ± its bound; P1dB per tone)", rows, RESULT_PRIORITIES,
                        wrapping=("Note", "Flags"))


def list_runs(db_url: str, limit: int) -> list[tuple[str, ...]]:
    sessions = session_factory(open_database(db_url, read_only=True))
    with sessions() as session:
        counts = dict(session.execute(select(Point.run_id, func.count()).group_by(Point.run_id)).all())
        runs = session.scalars(select(Run).order_by(Run.started_at.desc()).limit(limit)).all()
        return [
            (
                run.guid,
                run.started_at.strftime("%Y-%m-%d %H:%M:%S"),
                run.status,
                f"{run.device.part_number} {run.device.serial}" if run.device else "",
                run.bench.name,
                str(counts.get(run.id, 0)),
            )
            for run in runs
        ]


def describe_run(db_url: str, ident: str, console: Console) -> None:
    sessions = session_factory(open_database(db_url, read_only=True))
    with sessions() as session:
        run = find_run(session, ident)
        device = run.device
        console.print(f"run {run.guid}", highlight=False)
        console.print(Text.assemble("  status:  ", styled(run.status), f" ({run.end_reason})" if run.end_reason else ""))
        ended = run.ended_at.strftime("%Y-%m-%d %H:%M:%S") if run.ended_at else "-"
        console.print(f"  started: {run.started_at:%Y-%m-%d %H:%M:%S} UTC, ended: {ended} UTC", highlight=False)
        console.print(f"  device:  {device.part_number} serial {device.serial} lot {device.lot or '-'}", highlight=False)
        console.print(f"  bench:   {run.bench.name}{' (simulated)' if run.simulated else ''}", highlight=False)
        console.print(f"  plan:    {run.plan.name} (sha256 {run.plan.sha256[:12]})", highlight=False)
        failed = [p for p in run.points if p.status == "failed"]
        console.print(f"  points:  {len(run.points)}" + (f" ({len(failed)} failed)" if failed else ""), highlight=False)
        if run.status == "running" and run.owner:
            beat = run.heartbeat_at.strftime("%H:%M:%S") if run.heartbeat_at else "-"
            console.print(f"  owner:   {run.owner}, last heartbeat {beat} UTC", highlight=False)
        cal = run.calibration_set
        if cal is not None:
            console.print(f"  calibration: {cal.name} ({cal.method}, {cal.created_at:%Y-%m-%d})", highlight=False)
        referred = {r.calibration_set_id for r in run.results} - {None, run.calibration_set_id}
        for set_id in sorted(referred):
            other = session.get(CalibrationSet, set_id)
            console.print(f"  results re-referred to: {other.name} ({other.method})", highlight=False)
        console.print("instruments:", highlight=False)
        for inst in sorted(run.instruments, key=lambda i: i.role):
            console.print(f"  {inst.role:9} {inst.dialect:18} {inst.resource}  {inst.idn}", highlight=False)
        if run.results:
            ordered = sorted(run.results, key=lambda r: (r.temperature_c or 0.0, r.lo_dbm or 0.0, r.center_hz, r.spacing_hz, r.bias_v or 0.0))
            console.print(results_table(ordered, console))
            print_flags(session, run, ordered, console)
        for point in failed[:MAX_FAILED_SHOWN]:
            console.print(f"  failed point {point_name_of_key(point.point_key)}: {point.fail_reason}", highlight=False)
        if len(failed) > MAX_FAILED_SHOWN:
            console.print(f"  ... and {len(failed) - MAX_FAILED_SHOWN} more failed points", highlight=False)
        console.print("events (UTC):", highlight=False)
        for event in sorted(run.events, key=lambda e: (e.at, e.id)):
            console.print(f"  {event.at:%H:%M:%S} {event.level:7} {event.kind:12} {event.message}", highlight=False)


def print_flags(session, run: Run, results, console: Console) -> None:
    """Each result's flags with reason and error, then a count of the flagged points by flag."""
    flagged = [r for r in results if r.flags]
    console.print("flags:" if flagged else "flags: none", highlight=False)
    for result in flagged:
        where = f"{result.center_hz / 1e9:.4f} GHz, {result.spacing_hz / 1e6:.3g} MHz"
        for flag in result.flags:
            console.print(f"  {where}: {flag_text(flag)}", highlight=False, soft_wrap=True)
    counts = session.execute(
        select(PointFlag.flag, PointFlag.cause, func.count(func.distinct(PointFlag.point_id)))
        .join(Point, Point.id == PointFlag.point_id)
        .where(Point.run_id == run.id)
        .group_by(PointFlag.flag, PointFlag.cause)
        .order_by(PointFlag.flag, PointFlag.cause)
    ).all()
    if counts:
        parts = [f"{flag}{'' if cause is None else f' ({cause})'} {n}" for flag, cause, n in counts]
        console.print(f"  flagged points: {', '.join(parts)} (reasons in the report's hover text)", highlight=False)
