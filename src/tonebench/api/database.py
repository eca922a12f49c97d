"""`tonebench.open(...)`: a database for notebooks and scripts, read-only unless a call writes."""

from __future__ import annotations

import datetime as dt
import os
from contextlib import contextmanager

import pandas as pd
import plotly.graph_objects as go

from tonebench.api.frames import results_frame
from tonebench.api.run_view import RunView
from tonebench.catalog.levels import result_extras
from tonebench.catalog.limits import LimitRule, list_limits
from tonebench.catalog.query import ResultFilter, find_results, latest_per_device
from tonebench.config.database_location import choose_database
from tonebench.errors import InputError
from tonebench.catalog.sweet_spots import find_sweet_spots
from tonebench.report.comparison import compare_figures
from tonebench.report.sweet_spot_plots import latest_per_device as latest_spots
from tonebench.store.database import open_database, session_factory
from tonebench.store.lookups import find_run
from tonebench.store.models import Device, Point, Run

RUN_COLUMNS = ("run_guid", "started_at", "ended_at", "status", "end_reason", "part_number", "serial", "lot",
               "wafer", "bench", "simulated", "plan", "points")


def open(location: str | os.PathLike | None = None) -> "Database":  # noqa: A001 - the API's name, as `tonebench.open`
    """Open a tonebench database read-only: a file path (SQLite) or a SQLAlchemy URL; without one,
    the CLI's default (TONEBENCH_DB, the per-user config file, else tonebench.db here)."""
    return Database(choose_database(None if location is None else os.fspath(location)).url)


class Database:
    """A tonebench database. Every method reads, except analyze(), which says so."""

    def __init__(self, url: str) -> None:
        self.url = url
        self._engine = open_database(url, read_only=True)
        self._sessions = session_factory(self._engine)

    def __repr__(self) -> str:
        return f"<tonebench database {self._engine.url.render_as_string(hide_password=True)}>"

    @contextmanager
    def session(self):
        with self._sessions() as session:
            yield session

    def close(self) -> None:
        self._engine.dispose()

    def __enter__(self) -> "Database":
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()

    # --- runs -----------------------------------------------------------------------------------

    def runs(self, part: str | None = None, serial: str | None = None, lot: str | None = None,
             status: str | None = None, since: dt.datetime | None = None) -> pd.DataFrame:
        """One row per run, newest first (started_at and ended_at in UTC), filtered by device
        fields, status ('complete', 'paused', ...) and start time."""
        from sqlalchemy import func, select

        with self.session() as session:
            query = select(Run).join(Device, Device.id == Run.device_id).order_by(Run.started_at.desc())
            for column, value in ((Device.part_number, part), (Device.serial, serial), (Device.lot, lot),
                                  (Run.status, status)):
                if value is not None:
                    query = query.where(column == value)
            if since is not None:
                query = query.where(Run.started_at >= since)
            counts = dict(session.execute(select(Point.run_id, func.count()).group_by(Point.run_id)).all())
            rows = [(r.guid, r.started_at, r.ended_at, r.status, r.end_reason, r.device.part_number, r.device.serial,
                     r.device.lot, r.device.wafer, r.bench.name, r.simulated, r.plan.name, counts.get(r.id, 0))
                    for r in session.scalars(query)]
        return pd.DataFrame(rows, columns=list(RUN_COLUMNS))

    def run(self, ident: str) -> RunView:
        """A run by its GUID or a unique prefix (at least 4 characters)."""
        with self.session() as session:
            return RunView(self, find_run(session, ident))

    # --- results --------------------------------------------------------------------------------

    def find(self, part=None, lot=None, wafer=None, serial=None, tag=None, freq_hz=None, spacing_hz=None,
             bias_v=None, since=None, until=None, flag=None, flagged=None, verdict=None,
             rows: int | None = None) -> pd.DataFrame:
        """The rows `tonebench find --json` gives: its CSV columns, the intercept convention and
        the results per drive level (a list of dicts, empty for a ramp). Each of part, lot, wafer,
        serial, tag, flag and verdict takes one value or a list; freq_hz, spacing_hz and bias_v
        take a (low, high) pair, either end None for open; since/until are datetimes (UTC)."""
        with self.session() as session:
            flt = self._filter(part=part, lot=lot, wafer=wafer, serial=serial, tag=tag, freq_hz=freq_hz,
                               spacing_hz=spacing_hz, bias_v=bias_v, since=since, until=until, flag=flag,
                               flagged=flagged, verdict=verdict)
            found = find_results(session, flt, rows)
            extras = result_extras(session, [r.result_id for r in found])
        frame = results_frame(found)
        frame["im3_asymmetry_db"] = [extras[r.result_id]["im3_asymmetry_db"] for r in found]
        frame["intercept_convention"] = [extras[r.result_id]["intercept_convention"] for r in found]
        frame["levels"] = [extras[r.result_id]["levels"] for r in found]
        return frame

    def compare(self, all_runs: bool = False, **query) -> dict[str, go.Figure]:
        """The comparison report's figures for the results find(**query) gives, by name:
        'by-frequency', 'by-spacing', 'by-bias' (when some result has a bias), 'by-lot', 'ecdf',
        'wafer-maps' (when devices have die positions), 'asymmetry' and 'sweet-spots' (when devices
        have sweet-spot studies). One result per device and condition (its latest run), and one
        sweet spot per device, kind and temperature (its latest study), unless all_runs."""
        with self.session() as session:
            rows = query.pop("rows", None)
            found = find_results(session, self._filter(**query), rows)
            if not all_runs:
                found, _older = latest_per_device(found)
            limits = {part: [LimitRule.of(row) for row in list_limits(session, part)]
                      for part in {r.part_number for r in found}}
            spots = find_sweet_spots(session, self._filter(**query))
        if not found:
            raise InputError("compare: the query matched no results; nothing to compare")
        return compare_figures(found, limits, spots if all_runs else latest_spots(spots))

    @staticmethod
    def _filter(part=None, lot=None, wafer=None, serial=None, tag=None, freq_hz=None, spacing_hz=None,
                bias_v=None, since=None, until=None, flag=None, flagged=None, verdict=None) -> ResultFilter:
        ranges = {}
        for name, pair in (("freq", freq_hz), ("spacing", spacing_hz), ("bias", bias_v)):
            unit = "v" if name == "bias" else "hz"
            low, high = (None, None) if pair is None else _pair(pair, f"{name}_{unit}")
            ranges[f"{name}_min_{unit}"], ranges[f"{name}_max_{unit}"] = low, high
        return ResultFilter(parts=_many(part), lots=_many(lot), wafers=_many(wafer), serials=_many(serial),
                            tags=_many(tag), since=since, until=until, flags=_many(flag), flagged=flagged,
                            verdicts=_many(verdict), **ranges).check()

    # --- the one call that writes ---------------------------------------------------------------

    def analyze(self, run: RunView | str, cal: str | None = None) -> pd.DataFrame:
        """Fit the run's intercepts again from its stored points (re-referred to calibration set
        `cal` when given) and STORE the new results, as `tonebench analyze` does; returns them."""
        from tonebench.results.stored_results import analyze_run

        guid = run.guid if isinstance(run, RunView) else run
        engine = open_database(self.url)
        try:
            analyze_run(session_factory(engine), guid, cal)
        finally:
            engine.dispose()
        return self.run(guid).results()


def _many(value) -> tuple[str, ...]:
    if value is None:
        return ()
    return (value,) if isinstance(value, str) else tuple(value)


def _pair(pair, name: str) -> tuple[float | None, float | None]:
    try:
        low, high = pair
    except (TypeError, ValueError):
        raise InputError(f"{name}: give a (low, high) pair, either end None for open; got {pair!r}") from None
    return low, high
