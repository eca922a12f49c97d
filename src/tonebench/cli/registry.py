"""The device registry and spec-limit commands: `tonebench device ...` and `tonebench limit ...`."""

from __future__ import annotations

from typing import Annotated

import typer
from rich import box
from rich.table import Table

from tonebench.cli.common import DbOption, cell, db_session, one_line_errors, out

device_app = typer.Typer(rich_markup_mode=None, help="The device registry: part number, serial, lot, wafer, position, tags.", no_args_is_help=True)
limit_app = typer.Typer(rich_markup_mode=None, help="Spec limits per part number; they give each result a pass/fail verdict.", no_args_is_help=True)


# --- devices ------------------------------------------------------------------------------------

@device_app.command("add")
def device_add(
    part: Annotated[str, typer.Argument(help="Part number.")],
    serial: Annotated[str, typer.Argument(help="Serial number.")],
    lot: Annotated[str | None, typer.Option(help="Lot.")] = None,
    wafer: Annotated[str | None, typer.Option(help="Wafer.")] = None,
    position: Annotated[str | None, typer.Option(help="Position on the wafer or in the tray.")] = None,
    tag: Annotated[list[str] | None, typer.Option("--tag", help="Tag (repeatable).")] = None,
    notes: Annotated[str | None, typer.Option(help="Free-form notes.")] = None,
    db: DbOption = None,
) -> None:
    """Register a device before measuring it."""
    from tonebench.catalog.devices import add_device

    with one_line_errors(), db_session(db, write=True) as session:
        device = add_device(session, part, serial, lot=lot, wafer=wafer, position=position, tags=tag or (), notes=notes)
        out.print(f"device {device.part_number} serial {device.serial} registered", highlight=False)


@device_app.command("edit")
def device_edit(
    part: Annotated[str, typer.Argument(help="Part number.")],
    serial: Annotated[str, typer.Argument(help="Serial number.")],
    lot: Annotated[str | None, typer.Option(help="New lot (\"\" clears it).")] = None,
    wafer: Annotated[str | None, typer.Option(help="New wafer (\"\" clears it).")] = None,
    position: Annotated[str | None, typer.Option(help="New position (\"\" clears it).")] = None,
    tag: Annotated[list[str] | None, typer.Option("--tag", help="Replace the tags (repeatable).")] = None,
    notes: Annotated[str | None, typer.Option(help="New notes (\"\" clears them).")] = None,
    db: DbOption = None,
) -> None:
    """Change a registered device's lot, wafer, position, tags or notes; its runs stay as they are."""
    from tonebench.catalog.devices import edit_device

    with one_line_errors(), db_session(db, write=True) as session:
        device, said = edit_device(session, part, serial, lot=lot, wafer=wafer, position=position, tags=tag,
                                   notes=notes)
        what = "; ".join(said) if said else "nothing changed"
        out.print(f"device {device.part_number} serial {device.serial}: {what}", highlight=False)


@device_app.command("list")
def device_list(
    part: Annotated[str | None, typer.Option("--part", help="Only this part number.")] = None,
    lot: Annotated[str | None, typer.Option("--lot", help="Only this lot.")] = None,
    wafer: Annotated[str | None, typer.Option("--wafer", help="Only this wafer.")] = None,
    tag: Annotated[str | None, typer.Option("--tag", help="Only devices with this tag.")] = None,
    limit: Annotated[int, typer.Option("--rows", min=1, help="At most this many devices.")] = 200,
    db: DbOption = None,
) -> None:
    """List registered devices with their number of runs."""
    from tonebench.catalog.devices import list_devices

    with one_line_errors(), db_session(db) as session:
        table = Table(title="Devices", box=box.SIMPLE_HEAD, padding=(0, 1), pad_edge=False)
        for column in ("Part", "Serial", "Lot", "Wafer", "Position", "Tags", "Runs"):
            table.add_column(column)
        for item in list_devices(session, part_number=part, lot=lot, wafer=wafer, tag=tag, limit=limit):
            d = item.device
            table.add_row(d.part_number, d.serial, d.lot or "-", d.wafer or "-", d.position or "-",
                          ", ".join(d.tags or ()), str(item.n_runs))
        out.print(table)


@device_app.command("show")
def device_show(
    part: Annotated[str, typer.Argument(help="Part number.")],
    serial: Annotated[str, typer.Argument(help="Serial number.")],
    db: DbOption = None,
) -> None:
    """Show one device: registry fields and its runs."""
    from tonebench.catalog.devices import device_runs, get_device

    with one_line_errors(), db_session(db) as session:
        d = get_device(session, part, serial)
        for label, value in (("device", f"{d.part_number} serial {d.serial}"), ("lot", d.lot), ("wafer", d.wafer),
                             ("position", d.position), ("tags", ", ".join(d.tags or ())), ("notes", d.notes)):
            out.print(f"{label + ':':10} {value or '-'}", highlight=False)
        out.print("runs (UTC):", highlight=False)
        for run in device_runs(session, d):
            out.print(f"  {run.guid}  {run.started_at:%Y-%m-%d %H:%M}  {run.status:9} {run.bench.name}", highlight=False)


# --- limits -------------------------------------------------------------------------------------

@limit_app.command("add")
def limit_add(
    part: Annotated[str, typer.Argument(help="Part number the limit is for.")],
    parameter: Annotated[str, typer.Argument(help="iip3_dbm, oip3_dbm, gain_db, p1db_in_dbm, iip2_dbm (results), im3_dbc, im3_dbc_pep (IMD at --tone-dbm, dBc) or sweet_spot_v, window_width_v, sweet_spot_iip3_dbm (measured sweet spots).")],
    freq_min_hz: Annotated[float, typer.Option("--freq-min-hz", help="Lowest center frequency it covers (Hz).")],
    freq_max_hz: Annotated[float, typer.Option("--freq-max-hz", help="Highest center frequency it covers (Hz).")],
    min_value: Annotated[float | None, typer.Option("--min", help="Lowest allowed value (dBm, dB or V).")] = None,
    max_value: Annotated[float | None, typer.Option("--max", help="Highest allowed value (dBm, dB or V).")] = None,
    spacing_min_hz: Annotated[float | None, typer.Option("--spacing-min-hz", help="Only from this tone spacing (Hz).")] = None,
    spacing_max_hz: Annotated[float | None, typer.Option("--spacing-max-hz", help="Only up to this tone spacing (Hz).")] = None,
    bias_min_v: Annotated[float | None, typer.Option("--bias-min-v", help="Only from this bias (V).")] = None,
    bias_max_v: Annotated[float | None, typer.Option("--bias-max-v", help="Only up to this bias (V).")] = None,
    temp_min_c: Annotated[float | None, typer.Option("--temp-min-c", help="Only from this chamber set point (degC).")] = None,
    temp_max_c: Annotated[float | None, typer.Option("--temp-max-c", help="Only up to this chamber set point (degC).")] = None,
    tone_dbm: Annotated[float | None, typer.Option("--tone-dbm", help="IMD limits (im3_dbc, im3_dbc_pep): the stated tone level, dBm per tone at the DUT input.")] = None,
    notes: Annotated[str | None, typer.Option(help="Where the limit comes from.")] = None,
    db: DbOption = None,
) -> None:
    """Add a spec limit and judge the part's stored results and sweet spots again."""
    from tonebench.catalog.limits import add_limit

    with one_line_errors(), db_session(db, write=True) as session:
        limit = add_limit(session, part, parameter, freq_min_hz=freq_min_hz, freq_max_hz=freq_max_hz,
                          min_value=min_value, max_value=max_value, spacing_min_hz=spacing_min_hz,
                          spacing_max_hz=spacing_max_hz, bias_min_v=bias_min_v, bias_max_v=bias_max_v,
                          temp_min_c=temp_min_c, temp_max_c=temp_max_c, tone_dbm=tone_dbm, notes=notes)
        out.print(f"limit {limit.id} added; verdicts of {limit.part_number} now: {_judge_part(session, limit.part_number)}",
                  highlight=False)


def _judge_part(session, part_number: str) -> str:
    """Judge the part's results and measured sweet spots again; the counts as one phrase."""
    from tonebench.catalog.limits import apply_finding_verdicts, apply_verdicts

    phrases = []
    for what, counts in (("results", apply_verdicts(session, part_number=part_number)),
                         ("sweet spots", apply_finding_verdicts(session, part_number=part_number))):
        if counts:
            phrases.append(f"{what} " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items())))
        elif what == "results":
            phrases.append("no results")
    return "; ".join(phrases)


@limit_app.command("list")
def limit_list(
    part: Annotated[str | None, typer.Option("--part", help="Only this part number.")] = None,
    db: DbOption = None,
) -> None:
    """List spec limits."""
    from tonebench.catalog.limits import list_limits
    from tonebench.report.terminal import fitted_table

    def span(low, high, scale=1.0):
        return "any" if low is None and high is None else f"{cell(low and low / scale, 'g')}..{cell(high and high / scale, 'g')}"

    with one_line_errors(), db_session(db) as session:
        rows = [{"Id": str(l.id), "Part": l.part_number, "Parameter": l.parameter, "Min": _limit_value(l.min_value, l.parameter),
                 "Max": _limit_value(l.max_value, l.parameter), "GHz": span(l.freq_min_hz, l.freq_max_hz, 1e9),
                 "Spacing MHz": span(l.spacing_min_hz, l.spacing_max_hz, 1e6), "Bias V": span(l.bias_min_v, l.bias_max_v),
                 "degC": span(l.temp_min_c, l.temp_max_c), "Tone dBm": cell(l.tone_dbm),
                 "Notes": l.notes or ""}
                for l in list_limits(session, part)]
        if not any(row["Notes"] for row in rows):
            rows = [{c: v for c, v in row.items() if c != "Notes"} for row in rows]
        out.print(fitted_table(out, "Spec limits", rows, _LIMIT_PRIORITIES, wrapping=("Notes",)))


def _limit_value(value: float | None, parameter: str) -> str:
    from tonebench.catalog.limits import format_limit_value, parameter_unit

    return "-" if value is None else format_limit_value(value, parameter_unit(parameter))


_LIMIT_PRIORITIES = {"Id": 9, "Part": 9, "Parameter": 9, "Min": 9, "Max": 9, "GHz": 8, "Spacing MHz": 5, "Bias V": 5,
                     "degC": 6, "Tone dBm": 6, "Notes": 3}


@limit_app.command("remove")
def limit_remove(
    limit_id: Annotated[int, typer.Argument(metavar="ID", help="Limit id (see `limit list`).")],
    db: DbOption = None,
) -> None:
    """Remove a spec limit and judge the part's stored results and sweet spots again."""
    from tonebench.catalog.limits import remove_limit

    with one_line_errors(), db_session(db, write=True) as session:
        removed = remove_limit(session, limit_id)
        out.print(f"limit {limit_id} removed; verdicts of {removed.part_number} now: "
                  f"{_judge_part(session, removed.part_number)}", highlight=False)
