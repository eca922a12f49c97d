"""Read-only views of the store for the CLI: the run list and one run in detail."""

from __future__ import annotations

from rich.console import Console
from rich.table import Table
from sqlalchemy import func, select

from tonebench.review import find_run, result_row
from tonebench.store.database import open_database, session_factory
from tonebench.store.models import Point, Run


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
        console.print(f"  started: {run.started_at:%Y-%m-%d %H:%M:%S} UTC, ended: {run.ended_at or '-'}", highlight=False)
        console.print(f"  device:  {device.part_number} serial {device.serial} lot {device.lot or '-'}", highlight=False)
        console.print(f"  bench:   {run.bench.name}{' (simulated)' if run.simulated else ''}", highlight=False)
        console.print(f"  plan:    {run.plan.name} (sha256 {run.plan.sha256[:12]})", highlight=False)
        console.print(f"  points:  {len(run.points)}", highlight=False)
        instruments = Table(title="Instruments")
        for column in ("Role", "Resource", "Dialect", "*IDN?"):
            instruments.add_column(column)
        for inst in sorted(run.instruments, key=lambda i: i.role):
            instruments.add_row(inst.role, inst.resource, inst.dialect, inst.idn)
        console.print(instruments)
        if run.results:
            results = Table(title="Results")
            rows = [result_row(r) for r in sorted(run.results, key=lambda r: (r.center_hz, r.spacing_hz))]
            for column in rows[0]:
                results.add_column(column)
            for row in rows:
                results.add_row(*row.values())
            console.print(results)
        events = Table(title="Events")
        for column in ("At (UTC)", "Level", "Kind", "Message"):
            events.add_column(column)
        for event in sorted(run.events, key=lambda e: e.at):
            events.add_row(f"{event.at:%H:%M:%S}", event.level, event.kind, event.message)
        console.print(events)
