"""Characterization database commands: queries, comparison reports, export and import (the
device and limit commands are in registry.py)."""

from __future__ import annotations

import csv
import datetime as dt
import json
import sys
from pathlib import Path
from typing import Annotated

import typer

from tonebench.cli.common import DbOption, cell, database, db_session, one_line_errors, out
from tonebench.cli.registry import device_app, limit_app
from tonebench.errors import InputError



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
              "Run": r.run_guid[:8], "degC": cell(r.temperature_c, ".1f"), "LO dBm": cell(r.lo_dbm, "+.2f"),
              "Center": format_freq(r.center_hz),
              "Spacing": format_freq(r.spacing_hz), "Bias V": cell(r.bias_v, "g"), "Gain": cell(r.gain_db, ".2f"),
              "IIP3": cell(r.iip3_dbm), "OIP3": cell(r.oip3_dbm), "Verdict": styled(r.verdict), "Flags": ", ".join(r.flags)}
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
        with db_session(db) as session:
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
    with db_session(db) as session:
        rows = find_sweet_spots(session, flt, temp_min_c, temp_max_c, limit)
    if not (as_csv or as_json):
        cells = []
        for r in rows:
            width = None if r["window_low_v"] is None else 1e3 * (r["window_high_v"] - r["window_low_v"])
            cells.append({"Part": r["part_number"], "Serial": r["serial"], "degC": cell(r["temperature_c"], ".1f"),
                          "From": "DC" if r["kind"] == "dc-prediction" else "2-tone", "Spot V": f"{r['sweet_spot_v']:.4f}",
                          "± mV": cell(1e3 * r["sweet_spot_bound_v"], ".1f"), "Window mV": cell(width, ".1f"),
                          "Peak IIP3": cell(r["peak_iip3_dbm"]), "Verdict": styled(r["verdict"]) if r["verdict"] else "-"})
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
        with db_session(db) as session:
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
    with one_line_errors(), db_session(db) as session:
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
