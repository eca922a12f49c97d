"""Characterization database commands: devices, spec limits, queries, comparison reports,
export and import."""

from __future__ import annotations

import csv
import datetime as dt
import json
import sys
from contextlib import contextmanager
from pathlib import Path
from typing import Annotated, Iterator

import typer
from rich import box
from rich.table import Table

from tonebench.cli.common import DbOption, database, one_line_errors, out
from tonebench.errors import InputError

device_app = typer.Typer(rich_markup_mode=None, help="The device registry: part number, serial, lot, wafer, position, tags.", no_args_is_help=True)
limit_app = typer.Typer(rich_markup_mode=None, help="Spec limits per part number; they give each result a pass/fail verdict.", no_args_is_help=True)


@contextmanager
def _session(db: str | None, write: bool = False) -> Iterator:
    from tonebench.store.database import open_database, session_factory

    engine = open_database(database(db), read_only=not write)  # reading never creates one
    try:
        sessions = session_factory(engine)
        with (sessions.begin() if write else sessions()) as session:
            yield session
    finally:
        engine.dispose()


def _when(text: str | None, option: str) -> dt.datetime | None:
    """A date or ISO time; without a zone it is UTC."""
    if text is None:
        return None
    try:
        value = dt.datetime.fromisoformat(text)
    except ValueError:
        raise InputError(f"{option} '{text}': not a date or time; give e.g. 2026-03-01 or 2026-03-01T14:30") from None
    return value if value.tzinfo else value.replace(tzinfo=dt.timezone.utc)


# --- shared filter options ----------------------------------------------------------------------
Parts = Annotated[list[str] | None, typer.Option("--part", help="Part number (repeat for any of several).")]
Lots = Annotated[list[str] | None, typer.Option("--lot", help="Lot (repeatable).")]
Wafers = Annotated[list[str] | None, typer.Option("--wafer", help="Wafer (repeatable).")]
Serials = Annotated[list[str] | None, typer.Option("--serial", help="Serial number (repeatable).")]
Tags = Annotated[list[str] | None, typer.Option("--tag", help="Device tag (repeatable: devices with any of them).")]
FreqMin = Annotated[float | None, typer.Option("--freq-min-hz", help="Lowest center frequency (Hz).")]
FreqMax = Annotated[float | None, typer.Option("--freq-max-hz", help="Highest center frequency (Hz).")]
SpacingMin = Annotated[float | None, typer.Option("--spacing-min-hz", help="Smallest tone spacing (Hz).")]
SpacingMax = Annotated[float | None, typer.Option("--spacing-max-hz", help="Largest tone spacing (Hz).")]
BiasMin = Annotated[float | None, typer.Option("--bias-min-v", help="Lowest bias (V); results without bias drop out.")]
BiasMax = Annotated[float | None, typer.Option("--bias-max-v", help="Highest bias (V).")]
Since = Annotated[str | None, typer.Option("--since", help="Runs started at or after this date/time (UTC unless given).")]
Until = Annotated[str | None, typer.Option("--until", help="Runs started before this date/time (UTC unless given).")]
Flags = Annotated[list[str] | None, typer.Option("--flag", help="Results carrying this result flag (repeatable); point flags do not count.")]
Flagged = Annotated[bool | None, typer.Option("--flagged/--unflagged", help="Only results the test system may have limited (some result flag), or only those with none.")]
Verdicts = Annotated[list[str] | None, typer.Option("--verdict", help="pass, fail or no-limit (repeatable).")]
# --rows, not --limit: `limit` is the command for spec limits.
Limit = Annotated[int | None, typer.Option("--rows", min=1, help="At most this many results.")]


def _filter(part, lot, wafer, serial, tag, freq_min_hz, freq_max_hz, spacing_min_hz, spacing_max_hz,
            bias_min_v, bias_max_v, since, until, flag, flagged, verdict):
    from tonebench.catalog.query import ResultFilter

    return ResultFilter(
        parts=tuple(part or ()), lots=tuple(lot or ()), wafers=tuple(wafer or ()), serials=tuple(serial or ()),
        tags=tuple(tag or ()), freq_min_hz=freq_min_hz, freq_max_hz=freq_max_hz, spacing_min_hz=spacing_min_hz,
        spacing_max_hz=spacing_max_hz, bias_min_v=bias_min_v, bias_max_v=bias_max_v,
        since=_when(since, "--since"), until=_when(until, "--until"), flags=tuple(flag or ()), flagged=flagged,
        verdicts=tuple(verdict or ()),
    ).check()


def _export_value(value):
    if isinstance(value, dt.datetime):
        return value.isoformat()
    if isinstance(value, tuple):
        return list(value)
    return value


def _print_rows(rows, as_csv: bool, as_json: bool, out_path: Path | None, extras: dict | None = None) -> None:
    from tonebench.catalog.query import EXPORT_FIELDS, LATER_AXIS_FIELDS

    if not (as_csv or as_json):
        _print_table(rows)
        return
    later = tuple(name for name in LATER_AXIS_FIELDS if as_json or any(getattr(r, name) is not None for r in rows))
    fields = (*EXPORT_FIELDS, *later)
    records = [{name: getattr(r, name) for name in fields} for r in rows]
    if extras is not None:
        missing = {"im3_asymmetry_db": None, "intercept_convention": None, "levels": []}
        records = [{**record, **extras.get(r.result_id, missing)} for record, r in zip(records, rows)]
        fields = (*fields, "im3_asymmetry_db", "intercept_convention", "levels")
    _write_export(records, fields, as_json, out_path)


def _write_export(records: list[dict], fields: tuple[str, ...], as_json: bool, out_path: Path | None) -> None:
    """Records as JSON or CSV, to out_path or the terminal."""
    stream = open(out_path, "w", newline="", encoding="utf-8") if out_path else sys.stdout
    try:
        if as_json:
            json.dump([{name: _export_value(r[name]) for name in fields} for r in records], stream, indent=1)
            stream.write("\n")
        else:
            writer = csv.writer(stream)
            writer.writerow(fields)
            for r in records:
                values = [_export_value(r[name]) for name in fields]
                writer.writerow([";".join(v) if isinstance(v, list) else "" if v is None else v for v in values])
    finally:
        if out_path:
            stream.close()


def _f(value, spec: str = "+.2f") -> str:
    return "-" if value is None else format(value, spec)


# Left out first when the terminal is narrow (lowest first); the IIP3 and the verdict stay.
_FIND_PRIORITIES = {"Part": 9, "Serial": 9, "Lot": 6, "Wafer": 2, "Run": 7, "degC": 8, "LO dBm": 8, "Center": 10, "Spacing": 7,
                    "Bias V": 8, "Gain": 5, "IIP3": 10, "OIP3": 4, "Verdict": 10, "Flags": 1}


def _print_table(rows) -> None:
    from tonebench.report.terminal import fitted_table, styled
    from tonebench.units import format_freq

    # Bias, temperature and flag columns only when some row has one.
    shown = {"Bias V": any(r.bias_v is not None for r in rows), "Flags": any(r.flags for r in rows),
             "degC": any(r.temperature_c is not None for r in rows),
             "LO dBm": any(r.lo_dbm is not None for r in rows)}
    cells = [{"Part": r.part_number, "Serial": r.serial, "Lot": r.lot or "-", "Wafer": r.wafer or "-",
              "Run": r.run_guid[:8], "degC": _f(r.temperature_c, ".1f"), "LO dBm": _f(r.lo_dbm, "+.2f"),
              "Center": format_freq(r.center_hz),
              "Spacing": format_freq(r.spacing_hz), "Bias V": _f(r.bias_v, "g"), "Gain": _f(r.gain_db, ".2f"),
              "IIP3": _f(r.iip3_dbm), "OIP3": _f(r.oip3_dbm), "Verdict": styled(r.verdict), "Flags": ", ".join(r.flags)}
             for r in rows]
    cells = [{c: v for c, v in row.items() if shown.get(c, True)} for row in cells]
    out.print(fitted_table(out, f"{len(rows)} results (dB, dBm)", cells, _FIND_PRIORITIES, wrapping=("Flags",)))


def register_catalog_commands(app: typer.Typer) -> None:
    """Add the device, limit, query, compare, export and import commands to the main app."""
    app.add_typer(device_app, name="device")
    app.add_typer(limit_app, name="limit")
    app.command("find")(find)
    app.command("compare")(compare)
    app.command("export")(export)
    app.command("import")(import_file)


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

    with one_line_errors(), _session(db, write=True) as session:
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

    with one_line_errors(), _session(db, write=True) as session:
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

    with one_line_errors(), _session(db) as session:
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

    with one_line_errors(), _session(db) as session:
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

    with one_line_errors(), _session(db, write=True) as session:
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
        return "any" if low is None and high is None else f"{_f(low and low / scale, 'g')}..{_f(high and high / scale, 'g')}"

    with one_line_errors(), _session(db) as session:
        rows = [{"Id": str(l.id), "Part": l.part_number, "Parameter": l.parameter, "Min": _limit_value(l.min_value, l.parameter),
                 "Max": _limit_value(l.max_value, l.parameter), "GHz": span(l.freq_min_hz, l.freq_max_hz, 1e9),
                 "Spacing MHz": span(l.spacing_min_hz, l.spacing_max_hz, 1e6), "Bias V": span(l.bias_min_v, l.bias_max_v),
                 "degC": span(l.temp_min_c, l.temp_max_c), "Tone dBm": _f(l.tone_dbm),
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

    with one_line_errors(), _session(db, write=True) as session:
        removed = remove_limit(session, limit_id)
        out.print(f"limit {limit_id} removed; verdicts of {removed.part_number} now: "
                  f"{_judge_part(session, removed.part_number)}", highlight=False)


# --- queries and reports ------------------------------------------------------------------------

def find(
    part: Parts = None, lot: Lots = None, wafer: Wafers = None, serial: Serials = None, tag: Tags = None,
    freq_min_hz: FreqMin = None, freq_max_hz: FreqMax = None, spacing_min_hz: SpacingMin = None,
    spacing_max_hz: SpacingMax = None, bias_min_v: BiasMin = None, bias_max_v: BiasMax = None,
    since: Since = None, until: Until = None, flag: Flags = None, flagged: Flagged = None,
    verdict: Verdicts = None, limit: Limit = None,
    as_csv: Annotated[bool, typer.Option("--csv", help="CSV instead of a table.")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="JSON instead of a table.")] = False,
    out_path: Annotated[Path | None, typer.Option("--out", help="Write CSV/JSON to this file instead of the terminal.")] = None,
    sweet_spots: Annotated[bool, typer.Option("--sweet-spots", help="Sweet-spot findings of `bias search` studies instead of results (device, date and temperature filters apply).")] = False,
    temp_min_c: Annotated[float | None, typer.Option("--temp-min-c", help="With --sweet-spots: chamber set point at least this (degC).")] = None,
    temp_max_c: Annotated[float | None, typer.Option("--temp-max-c", help="With --sweet-spots: chamber set point at most this (degC).")] = None,
    db: DbOption = None,
) -> None:
    """Find results by device, frequency, spacing, bias, date, flags and verdict."""
    from tonebench.catalog.query import find_results

    with one_line_errors():
        if as_csv and as_json:
            raise InputError("find: give --csv or --json, not both")
        if out_path and not (as_csv or as_json):
            raise InputError("find --out: give --csv or --json to say what to write")
        flt = _filter(part, lot, wafer, serial, tag, freq_min_hz, freq_max_hz, spacing_min_hz, spacing_max_hz,
                      bias_min_v, bias_max_v, since, until, flag, flagged, verdict)
        if sweet_spots:
            _find_sweet_spots(flt, temp_min_c, temp_max_c, limit, as_csv, as_json, out_path, db)
            return
        if temp_min_c is not None or temp_max_c is not None:
            raise InputError("find: --temp-min-c and --temp-max-c go with --sweet-spots")
        with _session(db) as session:
            rows = find_results(session, flt, limit)
            if as_json:  # the intercept convention and the results per drive level (catalog/levels.py)
                from tonebench.catalog.levels import result_extras

                extras = result_extras(session, [r.result_id for r in rows])
                _print_rows(rows, as_csv, as_json, out_path, extras)
                return
        _print_rows(rows, as_csv, as_json, out_path)


def _find_sweet_spots(flt, temp_min_c, temp_max_c, limit, as_csv, as_json, out_path, db) -> None:
    from tonebench.catalog.sweet_spots import SWEET_SPOT_FIELDS, find_sweet_spots
    from tonebench.report.terminal import fitted_table, styled

    result_only = [name for name, value in (("--freq/--spacing/--bias ranges", flt.freq_min_hz or flt.freq_max_hz
                                              or flt.spacing_min_hz or flt.spacing_max_hz or flt.bias_min_v
                                              or flt.bias_max_v), ("--flag/--flagged", flt.flags or flt.flagged is not None),
                                             ("--tag", flt.tags)) if value]
    if result_only:
        raise InputError(f"find --sweet-spots: {', '.join(result_only)} apply to results, not sweet spots; "
                         "allowed: --part, --lot, --wafer, --serial, --since, --until, --temp-min-c, --temp-max-c, --verdict")
    with _session(db) as session:
        rows = find_sweet_spots(session, flt, temp_min_c, temp_max_c, limit)
    if not (as_csv or as_json):
        cells = []
        for r in rows:
            width = None if r["window_low_v"] is None else 1e3 * (r["window_high_v"] - r["window_low_v"])
            cells.append({"Part": r["part_number"], "Serial": r["serial"], "degC": _f(r["temperature_c"], ".1f"),
                          "From": "DC" if r["kind"] == "dc-prediction" else "2-tone", "Spot V": f"{r['sweet_spot_v']:.4f}",
                          "± mV": _f(1e3 * r["sweet_spot_bound_v"], ".1f"), "Window mV": _f(width, ".1f"),
                          "Peak IIP3": _f(r["peak_iip3_dbm"]), "Verdict": styled(r["verdict"]) if r["verdict"] else "-"})
        out.print(fitted_table(out, f"{len(rows)} sweet-spot findings", cells, _SPOT_PRIORITIES))
        return
    _write_export(rows, SWEET_SPOT_FIELDS, as_json, out_path)


_SPOT_PRIORITIES = {"Part": 8, "Serial": 10, "degC": 9, "From": 10, "Spot V": 10, "± mV": 9, "Window mV": 9,
                    "Peak IIP3": 7, "Verdict": 10}


def compare(
    part: Parts = None, lot: Lots = None, wafer: Wafers = None, serial: Serials = None, tag: Tags = None,
    freq_min_hz: FreqMin = None, freq_max_hz: FreqMax = None, spacing_min_hz: SpacingMin = None,
    spacing_max_hz: SpacingMax = None, bias_min_v: BiasMin = None, bias_max_v: BiasMax = None,
    since: Since = None, until: Until = None, flag: Flags = None, flagged: Flagged = None,
    verdict: Verdicts = None, limit: Limit = None,
    out_path: Annotated[Path, typer.Option("--out", help="HTML file to write.")] = Path("tonebench-compare.html"),
    all_runs: Annotated[bool, typer.Option("--all-runs", help="Every run of a device, not only its latest.")] = False,
    db: DbOption = None,
) -> None:
    """Write a comparison report (self-contained HTML) of the results a query finds; a device
    measured several times shows its latest run unless --all-runs."""
    from tonebench.report.comparison import write_compare_report

    with one_line_errors():
        flt = _filter(part, lot, wafer, serial, tag, freq_min_hz, freq_max_hz, spacing_min_hz, spacing_max_hz,
                      bias_min_v, bias_max_v, since, until, flag, flagged, verdict)
        with _session(db) as session:
            written, count = write_compare_report(session, flt, out_path, limit, all_runs)
        out.print(f"compare report: {written} ({count} results)", highlight=False)


# --- moving runs between databases -------------------------------------------------------------

def export(
    out_path: Annotated[Path, typer.Argument(metavar="FILE", help="Transfer file to write (gzip JSON lines), or with --points the table.")],
    run: Annotated[list[str] | None, typer.Option("--run", help="Run GUID or unique prefix (repeatable; default all runs).")] = None,
    since: Since = None,
    points: Annotated[str | None, typer.Option("--points", metavar="FORMAT",
                                               help="Write the runs' points as one table instead: csv or parquet "
                                                    "(one row per point, with in_fit, left_out and flags).")] = None,
    db: DbOption = None,
) -> None:
    """Export runs with their points, results, flags, calibration and events to a portable file;
    with --points, the points of the runs as a CSV or Parquet table."""
    from tonebench.catalog.transfer import export_runs

    if points is not None:
        with one_line_errors():
            _export_points(db, run, since, points, out_path)
        return
    with one_line_errors(), _session(db) as session:
        summary = export_runs(session, out_path, run, _when(since, "--since"))
        out.print(f"exported {summary.runs} runs, {summary.points} points to {summary.path} "
                  f"(sha256 {summary.sha256[:16]})", highlight=False)


def _export_points(db, run, since, fmt: str, out_path: Path) -> None:
    from tonebench.api.database import Database
    from tonebench.api.points_export import POINT_FORMATS, points_of, write_points

    if fmt not in POINT_FORMATS:
        raise InputError(f"--points {fmt!r}: allowed formats are {', '.join(POINT_FORMATS)}")
    with Database(database(db)) as opened:
        runs = run
        if since is not None:
            listed = opened.runs(since=_when(since, "--since"))
            runs = [g for g in listed["run_guid"] if not run or any(g.startswith(r.lower()) for r in run)]
            if not runs:
                raise InputError(f"--since {since}: no run started since then; nothing to export")
        frame = points_of(opened, runs)
        written = write_points(frame, out_path, fmt)
    out.print(f"exported {len(frame)} points of {frame['run_guid'].nunique()} runs to {written} ({fmt})", highlight=False)


def import_file(
    in_path: Annotated[Path, typer.Argument(metavar="FILE", help="Transfer file written by `tonebench export`.")],
    db: DbOption = None,
) -> None:
    """Import runs from a transfer file; runs already present (same GUID) are left as they are."""
    from tonebench.catalog.transfer import import_runs
    from tonebench.store.database import open_database, session_factory

    with one_line_errors():
        engine = open_database(database(db))
        try:
            summary = import_runs(session_factory(engine), in_path)
        finally:
            engine.dispose()
        shared = ", ".join(f"{v} {k.replace('_', ' ')}s" for k, v in sorted(summary.added.items()))
        out.print(f"imported {summary.runs_added} runs ({summary.points_added} points); "
                  f"{summary.runs_present} already present" + (f"; added {shared}" if shared else ""), highlight=False)
