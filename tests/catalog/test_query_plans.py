"""Every filter of `find` is served by an index on both backends, read from the planner itself
(SQLite's EXPLAIN QUERY PLAN; PostgreSQL's EXPLAIN with sequential scans priced out, since on a
near-empty table a scan is always cheapest). A filter no index serves would scan every result of
a catalog of millions of points."""

from __future__ import annotations

import datetime as dt

import pytest

from tonebench.catalog.query import ResultFilter, result_query

UTC = dt.UTC
FILTERS = {
    "part": (ResultFilter(parts=("KLN-2417A",)), "devices_part_number"),
    "lot": (ResultFilter(lots=("TB24-031",)), "ix_devices_lot"),
    "wafer": (ResultFilter(wafers=("W05",)), "ix_devices_wafer"),
    "serial": (ResultFilter(serials=("KLN24031-0117",)), "ix_devices_serial"),
    "frequency": (ResultFilter(freq_min_hz=2.4e9, freq_max_hz=2.5e9), "ix_results_center_spacing"),
    "spacing": (ResultFilter(spacing_min_hz=1e6, spacing_max_hz=2e6), "ix_results_spacing"),
    "bias": (ResultFilter(bias_min_v=0.5, bias_max_v=0.6), "ix_results_bias"),
    "verdict": (ResultFilter(verdicts=("fail",)), "ix_results_verdict"),
    "since": (ResultFilter(since=dt.datetime(2026, 11, 1, tzinfo=UTC)), "ix_runs_started_at"),
    "until": (ResultFilter(until=dt.datetime(2026, 11, 1, tzinfo=UTC)), "ix_runs_started_at"),
    "flag": (ResultFilter(flags=("slope",)), "ix_result_flags_result_flag"),
    "flagged": (ResultFilter(flagged=True), "ix_result_flags_result_flag"),
}


def plan_text(engine, query) -> str:
    compiled = query.compile(engine, compile_kwargs={"literal_binds": True})
    with engine.connect() as connection:
        if engine.dialect.name == "sqlite":
            return "\n".join(row[-1] for row in connection.exec_driver_sql(f"EXPLAIN QUERY PLAN {compiled}"))
        connection.exec_driver_sql("SET enable_seqscan = off")
        return "\n".join(row[0] for row in connection.exec_driver_sql(f"EXPLAIN {compiled}"))


@pytest.mark.parametrize("name", FILTERS)
def test_each_find_filter_uses_an_index(engine, name):
    flt, index = FILTERS[name]
    text = plan_text(engine, result_query(flt, engine.dialect.name))
    # SQLite names the unique part-and-serial index after the table; PostgreSQL by its constraint.
    wanted = ("sqlite_autoindex_devices_1", "uq_devices_part_number_serial") if name == "part" else (index,)
    assert any(w in text for w in wanted), text
