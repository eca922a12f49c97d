"""Read-only views of the store for the CLI: the run list and one run in detail."""

from __future__ import annotations

from rich import box
from rich.console import Console
from rich.table import Table
from sqlalchemy import func, select

from tonebench.review import find_run, terminal_row
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import CalibrationSet, Point, Run


def results_table(results) -> Table:
    """Stored results as a compact terminal table; the Note column only when a sweep has one."""
    rows = [terminal_row(r) for r in results]
    table = Table(title="Results (dB, dBm)", box=box.SIMPLE_HEAD, padding=(0, 1), pad_edge=False, collapse_padding=True)
    show_note = any(row["Note"] for row in rows)
    for column in rows[0] if rows else ():
        if column != "Note" or show_note:
            table.add_column(column, no_wrap=column != "Note")
    for row in rows:
        table.add_row(*(value for key, value in row.items() if key != "Note" or show_note))
    return table


def list_runs(db_url: str, limit: int) -> list[tuple[str, ...]]:
    sessions = session_factory(open_database(db_url))
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
    sessions = session_factory(open_database(db_url))
    with sessions() as session:
        run = find_run(session, ident)
        device = run.device
        console.print(f"run {run.guid}", highlight=False)
        console.print(f"  status:  {run.status}" + (f" ({run.end_reason})" if run.end_reason else ""), highlight=False)
        ended = run.ended_at.strftime("%Y-%m-%d %H:%M:%S") if run.ended_at else "-"
        console.print(f"  started: {run.started_at:%Y-%m-%d %H:%M:%S} UTC, ended: {ended} UTC", highlight=False)
        console.print(f"  device:  {device.part_number} serial {device.serial} lot {device.lot or '-'}", highlight=False)
        console.print(f"  bench:   {run.bench.name}{' (simulated)' if run.simulated else ''}", highlight=False)
        console.print(f"  plan:    {run.plan.name} (sha256 {run.plan.sha256[:12]})", highlight=False)
        console.print(f"  points:  {len(run.points)}", highlight=False)
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
            console.print(results_table(sorted(run.results, key=lambda r: (r.center_hz, r.spacing_hz))))
        console.print("events (UTC):", highlight=False)
        for event in sorted(run.events, key=lambda e: e.at):
            console.print(f"  {event.at:%H:%M:%S} {event.level:7} {event.kind:10} {event.message}", highlight=False)
