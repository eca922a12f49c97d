"""The comparison report: its content, and that it renders in headless Chromium with no network
(tests/chromium_pages.py drives the browser)."""

from __future__ import annotations

import pytest
from chromium_pages import leaving_requests, load_in_chromium
from plotly.offline import get_plotlyjs

from tonebench.report.comparison import MAX_DEVICE_TRACES, render_compare_page, write_compare_report
from tonebench.catalog.limits import LimitRule, add_limit
from tonebench.catalog.query import ResultFilter, ResultRow, find_results
from tonebench.catalog.synthetic import Layout, fill
from tonebench.errors import InputError
from tonebench.store import open_database, session_factory

LAYOUT = Layout(centers_hz=(2.40e9, 2.45e9, 2.50e9), spacings_hz=(1.0e6, 10.0e6), biases_v=(None, 3.3),
                tones_dbm=(-30.0, -20.0, -10.0))


@pytest.fixture
def database(tmp_path):
    engine = open_database(f"sqlite:///{tmp_path / 'catalog.db'}")
    fill(engine, 9, seed=4, layout=LAYOUT, n_lots=3, flag_fraction=0.4)
    with session_factory(engine).begin() as session:
        add_limit(session, "QMX-4410", "iip3_dbm", min_value=3.5, freq_min_hz=2.3e9, freq_max_hz=2.6e9)
    yield engine
    engine.dispose()


def test_report_renders_in_chromium_without_network(database, tmp_path):
    page = tmp_path / "compare.html"
    with session_factory(database)() as session:
        rows = find_results(session, ResultFilter())
        write_compare_report(session, ResultFilter(), page)
    load = load_in_chromium(page, tmp_path, want_figures=7)
    assert leaving_requests(load, page) == []
    assert load.requests == [page.resolve().as_uri()]
    assert load.exceptions == []
    # frequency, spacing, bias, lots, distribution, wafer maps, asymmetry: every figure drawn
    assert load.state["figures"] == load.state["drawn"] == 7, load.state
    assert any(title.startswith("Wafer maps") for title in load.state["titles"])
    assert any("empirical CDF" in title for title in load.state["titles"])
    plotted = sum(1 for r in rows if r.iip3_dbm is not None)
    assert load.state["points"] >= 2 * plotted  # IIP3 and OIP3 of each result, at least
    assert load.state["boxes"] == len({(r.part_number, r.lot) for r in rows})
    assert any("spacing" in title for title in load.state["titles"])


def test_the_network_check_sees_a_page_that_reaches_out(tmp_path):
    # Shows the check above can fail: a page with a remote script and image is caught.
    page = tmp_path / "leaky.html"
    page.write_text('<html><head><script src="https://cdn.example.invalid/lib.js"></script></head>'
                    '<body><img src="http://img.example.invalid/a.png"><p>hello</p></body></html>')
    load = load_in_chromium(page, tmp_path)
    assert sorted(leaving_requests(load, page)) == ["http://img.example.invalid/a.png",
                                                    "https://cdn.example.invalid/lib.js"]
    assert load.state["drawn"] == 0


def row(serial: str, lot: str, iip3: float | None, flags=(), bias=None, part="QMX-4410") -> ResultRow:
    return ResultRow(
        result_id=0, run_guid="0f0e0d0c-0000-4000-8000-000000000000", started_at=None, part_number=part,
        serial=serial, lot=lot, wafer="W01", position=None, tags=(), center_hz=2.45e9, spacing_hz=1e6,
        bias_v=bias, gain_db=14.0, iip3_dbm=iip3, iip3_lower_dbm=None if iip3 is None else iip3 - 0.2,
        iip3_upper_dbm=None if iip3 is None else iip3 + 0.2, oip3_dbm=None if iip3 is None else iip3 + 14.0,
        oip3_lower_dbm=None, oip3_upper_dbm=None, p1db_in_dbm=None, iip2_dbm=None, iip3_bound_db=None,
        n_valid=5, n_points=9, verdict="pass", verdict_detail=None, reason=None, flags=tuple(flags))


def test_page_content_flagged_apart_escaped_and_self_contained():
    rows = [row("S1", "L1", 4.0), row("S2", "L1", 4.5, flags=("analyzer-limited",)),
            row("<script>alert(1)</script>", "L2", 5.0, flags=("slope",)), row("S4", "L2", None)]
    limits = {"QMX-4410": [LimitRule(7, "iip3_dbm", 3.5, None, 2.3e9, 2.6e9)]}
    page = render_compare_page(rows, limits, "lots L1, L2")
    assert page.count(get_plotlyjs()[:500]) == 1  # plotly.js embedded once
    assert "<script src" not in page
    assert "<script>alert(1)</script>" not in page  # device text is escaped, in HTML and in plot data
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    flagged_table = page[page.index("Flagged results"):]
    assert "QMX-4410 S2" in flagged_table and "analyzer-limited" in flagged_table
    assert "QMX-4410 S1" not in flagged_table
    assert "QMX-4410 IIP3 min +3.5 dBm, 2.300-2.600 GHz" in page
    assert "4 (1 without a fitted IIP3, not plotted)" in page
    assert "No result in this selection was measured with a bias" in page


def test_many_devices_are_drawn_per_lot_and_an_empty_query_is_refused():
    many = [row(f"S{i:03d}", f"L{i % 3}", 4.0 + i / 100) for i in range(MAX_DEVICE_TRACES + 1)]
    page = render_compare_page(many, {}, "all results")
    assert "one trace per lot: too many devices" in page
    few = render_compare_page(many[:MAX_DEVICE_TRACES], {}, "all results")
    assert "one trace per lot" not in few
    with pytest.raises(InputError, match="matched no results"):
        render_compare_page([], {}, "lots NOPE")


def test_a_device_has_one_colour_in_both_panels():
    from tonebench.report.comparison import _against

    rows = [row("S1", "L1", 4.0), row("S2", "L1", 4.5), row("S3", "L2", 5.0)]
    fig = _against(rows, "center_hz", 1e9, "center frequency (GHz)", "Intercepts against frequency")
    by_device: dict[str, set[str]] = {}
    for trace in fig.data:
        by_device.setdefault(trace.legendgroup, set()).add(trace.marker.color)
    assert len(by_device) == 3
    assert all(len(colors) == 1 for colors in by_device.values())  # IIP3 and OIP3 drawn alike
    assert len({next(iter(colors)) for colors in by_device.values()}) == 3  # and devices apart


def test_no_two_devices_share_a_style_and_each_keeps_it_in_every_panel():
    from tonebench.report.comparison import _against, series_styles

    rows = [row(f"S{i:02d}", f"L{i % 3}", 4.0 + i / 10, bias=0.5 if i % 2 else None) for i in range(25)]
    styles = series_styles(rows)
    assert len(set(styles.values())) == 25  # 25 devices: colours repeat past ten, shapes then differ
    by_frequency = _against(rows, "center_hz", 1e9, "GHz", "f", styles=styles)
    by_bias = _against([r for r in rows if r.bias_v is not None], "bias_v", 1.0, "V", "b", styles=styles)
    for fig in (by_frequency, by_bias):
        for trace in fig.data:
            assert (trace.marker.color, trace.marker.symbol) == styles[trace.legendgroup]


def test_a_device_measured_twice_shows_its_latest_run_unless_all_runs():
    import datetime as dt

    from tonebench.catalog.query import latest_per_device

    first, second, other = row("S1", "L1", 4.0), row("S1", "L1", 4.6), row("S2", "L1", 5.0)
    first.started_at, second.started_at = dt.datetime(2026, 11, 2), dt.datetime(2026, 11, 30)
    other.started_at = dt.datetime(2026, 10, 1)
    first.run_guid, second.run_guid = "aaaa" + first.run_guid[4:], "bbbb" + first.run_guid[4:]
    kept, left_out = latest_per_device([second, first, other])
    assert kept == [second, other] and left_out == 1
    page = render_compare_page(kept, {}, "all", left_out)
    assert "1 results of earlier runs left out" in page
    assert "every run" in render_compare_page([second, first, other], {}, "all", -1)


def test_die_positions_and_the_wafer_map_outline_each_verdict():
    from tonebench.report.lot_plots import die_xy, wafer_maps

    assert die_xy("R12C7") == (7, 12) and die_xy("x3y-4") == (3, -4) and die_xy(" 3, -4 ") == (3, -4)
    assert die_xy("centre") is None and die_xy(None) is None
    rows = [row(f"S{i}", "L1", 4.0 + i) for i in range(3)] + [row("S9", "L1", 6.0)]
    for r, position, verdict in zip(rows, ("R1C1", "R1C2", "R2C1", "near the flat"), ("pass", "fail", None, "pass")):
        r.position, r.verdict = position, verdict
    fig, note = wafer_maps(rows)
    (trace,) = fig.data  # one wafer
    assert list(zip(trace.x, trace.y)) == [(1, 1), (2, 1), (1, 2)]
    assert list(trace.marker.color) == [4.0, 5.0, 6.0]
    assert list(trace.marker.line.color) == ["#2a8a4a", "#d01c1c", "rgba(0,0,0,0)"]  # pass, fail, not judged
    assert "1 device(s) without a die position" in note


def test_the_distribution_ends_at_one_with_the_spec_limit_drawn():
    from tonebench.report.comparison import SERIES_COLORS
    from tonebench.report.lot_plots import ecdf_figure

    rows = [row(f"S{i}", "L1", value) for i, value in enumerate((5.0, 3.0, 4.0, 6.0))]
    rows.append(row("S8", "L1", 1.0, flags=("slope",)))  # flagged: not in the distribution
    fig = ecdf_figure(rows, {"QMX-4410": [LimitRule(7, "iip3_dbm", 3.5, None, 2.3e9, 2.6e9)]}, SERIES_COLORS)
    (trace,) = fig.data
    assert list(trace.x) == [3.0, 4.0, 5.0, 6.0] and list(trace.y) == [0.25, 0.5, 0.75, 1.0]
    assert [shape.x0 for shape in fig.layout.shapes] == [3.5]


def _add_study(session, device, created_at, findings: dict[str, float], temperature_c=None):
    import uuid

    from tonebench.store.models import BiasFinding, BiasStudy

    study = BiasStudy(guid=str(uuid.uuid4()), device_id=device.id, created_at=created_at, bench_name="b",
                      temp_k=None, drain_v=3.0, window_points=41, polyorder=5, step_v=1e-3, current_sigma_a=2e-7,
                      run_guids="", temperature_c=temperature_c, center_hz=2.45e9)
    study.findings = [BiasFinding(kind=kind, sweet_spot_v=v, sweet_spot_bound_v=0.002, peak_iip3_dbm=20.0,
                                  window_low_v=v - 0.005, window_high_v=v + 0.006, window_bound_v=0.001, method="m")
                      for kind, v in findings.items()]
    session.add(study)


def test_the_sweet_spot_of_each_device_of_a_lot_is_drawn_with_its_window(database, tmp_path):
    import datetime as dt

    from tonebench.store.models import Device

    with session_factory(database).begin() as session:
        first, second = session.query(Device).order_by(Device.id).limit(2).all()
        utc = dt.timezone.utc
        _add_study(session, first, dt.datetime(2026, 11, 1, tzinfo=utc), {"dc-prediction": 0.570, "two-tone": 0.568})
        _add_study(session, first, dt.datetime(2026, 11, 20, tzinfo=utc), {"two-tone": 0.571})  # measured again
        _add_study(session, second, dt.datetime(2026, 11, 2, tzinfo=utc), {"two-tone": 0.590})
    page = tmp_path / "compare.html"
    with session_factory(database)() as session:
        write_compare_report(session, ResultFilter(), page)
    load = load_in_chromium(page, tmp_path, want_figures=8)
    assert leaving_requests(load, page) == [] and load.exceptions == []
    assert load.state["figures"] == load.state["drawn"] == 8, load.state
    spots = [t for t in load.state["traces"] if t["figure"] == "sweet-spots" and t["name"].startswith("sweet spot")]
    by_name = {t["name"]: t for t in spots}
    # The first device's later two-tone study replaces its earlier one: two measured points, one predicted.
    assert by_name["sweet spot, measured two-tone"]["points"] == 2
    assert by_name["sweet spot, predicted from DC"]["points"] == 1
    assert by_name["sweet spot, measured two-tone"]["symbol"] != by_name["sweet spot, predicted from DC"]["symbol"]
    from tonebench.report.sweet_spot_plots import latest_per_device, sweet_spot_figure

    with session_factory(database)() as session:
        from tonebench.catalog.sweet_spots import find_sweet_spots

        found = find_sweet_spots(session, ResultFilter())
    assert len(found) == 4 and len(latest_per_device(found)) == 3
    figure = sweet_spot_figure(latest_per_device(found))
    measured = next(t for t in figure.data if t.name == "sweet spot, measured two-tone")
    assert sorted(measured.y) == [0.571, 0.590]
    window = next(t for t in figure.data if t.name == "window, measured two-tone")
    assert [round(b, 3) for b in window.base] == [round(y - 0.005, 3) for y in measured.y]
    assert set(measured.marker.line.color) == {"#1f5fa8"} and figure.layout.shapes == ()  # no limits yet


def test_sweet_spot_limits_judge_measured_spots_and_show_on_the_comparison(database):
    import datetime as dt

    from tonebench.catalog.limits import add_limit, apply_finding_verdicts
    from tonebench.catalog.sweet_spots import find_sweet_spots
    from tonebench.report.lot_plots import VERDICT_OUTLINES
    from tonebench.report.sweet_spot_plots import sweet_spot_figure
    from tonebench.store.models import Device

    with session_factory(database).begin() as session:
        part = session.query(Device.part_number).order_by(Device.id).limit(1).scalar()
        first, second = session.query(Device).filter_by(part_number=part).order_by(Device.id).limit(2).all()
        when = dt.datetime(2026, 11, 1, tzinfo=dt.timezone.utc)
        _add_study(session, first, when, {"dc-prediction": 0.600, "two-tone": 0.571})
        _add_study(session, second, when, {"two-tone": 0.590})
        limit = add_limit(session, part, "sweet_spot_v", freq_min_hz=2.4e9, freq_max_hz=2.5e9, min_value=0.56,
                          max_value=0.58)
        counts = apply_finding_verdicts(session, part_number=part)
    # Two measured spots judged (the prediction, outside the limit, is not): one in, one out.
    assert counts == {"pass": 1, "fail": 1}
    with session_factory(database)() as session:
        found = find_sweet_spots(session, ResultFilter())
        limits = {part: [LimitRule.of(limit) for limit in session.query(type(limit))]}
    verdicts = {(r["serial"], r["kind"]): (r["verdict"], r["verdict_detail"]) for r in found}
    assert verdicts[(second.serial, "two-tone")] == ("fail", f"sweet_spot_v (limit {limit.id}): 0.5900 V above max 0.5800")
    assert verdicts[(first.serial, "two-tone")][0] == "pass" and verdicts[(first.serial, "dc-prediction")] == (None, None)
    figure = sweet_spot_figure(found, limits)
    measured = next(t for t in figure.data if t.name == "sweet spot, measured two-tone")
    outline = dict(zip(measured.y, measured.marker.line.color))
    assert outline == {0.571: VERDICT_OUTLINES["pass"], 0.590: VERDICT_OUTLINES["fail"]}
    assert sorted(shape.y0 for shape in figure.layout.shapes) == [0.56, 0.58]
