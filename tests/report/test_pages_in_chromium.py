"""Every page tonebench writes, opened in headless Chromium (tests/chromium_pages.py): nothing
leaves the page, no script fails, every figure is drawn, and what a reader must tell apart is
drawn apart, read back from the traces plotly holds in the page."""

from __future__ import annotations

import datetime as dt
import re

import numpy as np
from chromium_pages import leaving_requests, load_in_chromium
from cli_invoke import invoke
from conftest import SAMPLE_RUNS

from tonebench.calibration.sets import CalibrationView
from tonebench.planes.loss_table import LossTable
from tonebench.report.calibration_page import write_calibration_page


def _opened(page, tmp_path, figures: int):
    load = load_in_chromium(page, tmp_path, want_figures=figures)
    assert leaving_requests(load, page) == [] and load.exceptions == []
    assert load.state["figures"] == load.state["drawn"] == figures, load.state
    return load


def test_run_report_draws_both_products_apart_and_rings_flagged_points(tmp_path):
    page = tmp_path / "report.html"
    result = invoke("run", SAMPLE_RUNS / "demo_plan.toml", "--bench", SAMPLE_RUNS / "sim_bench.toml",
                    "--db", tmp_path / "t.db", "--report", page)
    assert result.exit_code == 0, result.output
    load = _opened(page, tmp_path, figures=4)  # the summary and three sweeps
    traces = load.state["traces"]
    assert any(t["figure"] == "summary" and t["points"] == 3 for t in traces)  # one point per sweep
    sweep = [t for t in traces if t["figure"] == "sweep-1"]
    lower = next(t for t in sweep if t["name"] == "IM3 lower (2f1-f2), in the fit")
    upper = next(t for t in sweep if t["name"] == "IM3 upper (2f2-f1), in the fit")
    assert lower["color"] != upper["color"] and (lower["symbol"], upper["symbol"]) == ("triangle-down", "triangle-up")
    rings = [t for t in sweep if t["name"].startswith("flagged")]
    left_out = [t for t in sweep if t["name"].startswith("left out: ")]
    assert rings and left_out, [t["name"] for t in sweep]
    # Flagged: a large red ring; left out: the product's own symbol, open, in grey.
    assert rings[0]["symbol"] == "circle-open" and rings[0]["color"] not in {t["color"] for t in left_out}
    # Left out: each product's own symbol, open (a fundamental's is circle-open too, told from the
    # ring by its grey colour, checked above).
    assert all(t["symbol"].endswith("-open") for t in left_out)
    assert {"triangle-down-open", "triangle-up-open"} <= {t["symbol"] for t in left_out}
    assert any(re.match(r"left out: .*(noise|compress)", t["name"]) for t in left_out)


def _calibration_view() -> CalibrationView:
    freqs_hz = [2.30e9, 2.31e9, 2.32e9, 2.50e9, 2.51e9]  # a gap between 2.32 and 2.50 GHz
    tables = {path: LossTable.from_rows(path, [[f, 6.0 + 0.01 * i + offset] for i, f in enumerate(freqs_hz)], "test")
              for path, offset in (("in1", 0.0), ("in2", 0.4), ("out", -4.0))}
    tone_dbm = [-15.0, -10.0, -5.0]
    sweep = {"atten_db": 20.0, "p1_dbm": tone_dbm, "p2_dbm": tone_dbm, "im3_lower_dbm": [-99.0, -87.0, -72.0],
             "im3_upper_dbm": [-98.0, -86.5, -71.5], "noise_lower_dbm": [-100.0] * 3, "noise_upper_dbm": [-100.0] * 3}
    residual = {"center_hz": 2.45e9, "spacing_hz": 1e6, "atten_db": 20.0, "system_ip3_dbm": 36.0,
                "source_ip3_dbm": None, "analyzer_ip3_dbm": 36.0,
                "sweep": {"tone_dbm": tone_dbm, "sweeps": [sweep, {**sweep, "atten_db": 30.0}]}}
    return CalibrationView(id=1, name="bench-3 cables", method="measured",
                           created_at=dt.datetime(2026, 11, 1, tzinfo=dt.timezone.utc), operator="lab",
                           instruments=[], source_files=[], freq_min_hz=2.3e9, freq_max_hz=2.51e9, valid_days=30.0,
                           expired_at=None, notes=None, tables=tables, residuals=[residual])


def test_calibration_page_gives_each_path_its_axis_and_no_line_across_a_gap(tmp_path):
    page = write_calibration_page(_calibration_view(), tmp_path / "cal.html")
    load = _opened(page, tmp_path, figures=2)  # the offsets and one residual
    offsets = [t for t in load.state["traces"] if t["figure"] == "offsets"]
    assert len(offsets) == 3 and all(t["mode"] == "lines+markers" for t in offsets)
    assert all(t["points"] == 6 for t in offsets)  # five measured frequencies and one break at the gap
    residual = [t for t in load.state["traces"] if t["figure"] == "residual-0"]
    assert {t["name"] for t in residual} >= {"IM3 lower (2f1-f2)", "IM3 upper (2f2-f1)"}
    assert len(residual) == 8  # two products and their noise, at two attenuations


def test_the_gap_breaks_the_line_and_each_path_has_its_own_axis():
    from tonebench.report.calibration_page import offsets_figure, with_gaps

    xs, ys = with_gaps(np.array([1e9, 1.1e9, 1.2e9, 2e9]), np.array([1.0, 1.1, 1.2, 2.0]))
    assert xs == [1.0, 1.1, 1.2, None, 2.0] and ys[3] is None
    figure = offsets_figure(_calibration_view())
    assert [trace.yaxis for trace in figure.data] == ["y", "y2", "y3"]


def test_bias_page_draws_in_chromium(tmp_path):
    from tonebench.report.bias_page import BiasFinding, BiasPageData, DcSweep, MeasuredIip3, render_bias_page
    from tonebench.report.html import write_html_file
    from tonebench.sim.fet import SimFet

    gate_v = np.round(np.arange(0.45, 0.70 + 1e-9, 0.001), 6)
    sweep = DcSweep(300.0, gate_v, SimFet().drain_a(gate_v, 300.0), 2e-7, 41, 5)
    measured = MeasuredIip3(300.0, -20.0, np.array([0.50, 0.56, 0.57, 0.58]), np.array([1.0, 14.0, 31.0, 16.0]),
                            np.array([False, False, True, False]))
    data = BiasPageData("Sweet spot: TBF-77 T77-0001", {"Run": "0123abcd"}, [sweep], [measured],
                        [BiasFinding("dc-prediction", 300.0, sweet_spot_v=0.5698)], what_if_ohm=(("Rs = 2 ohm", 2.0),))
    page = write_html_file(tmp_path / "bias.html", render_bias_page(data), "bias page")
    load = _opened(page, tmp_path, figures=3)
    by_name = {t["name"]: t for t in load.state["traces"] if t["figure"] == "iip3-0"}
    # Three measured IIP3 points, and the one whose IM3 sat at the noise floor drawn apart as a bound.
    assert by_name["measured at -20.0 dBm per tone"]["points"] == 3
    assert by_name["at least (IM3 at the noise floor)"]["points"] == 1
