"""The bias page draws what it is given: the stored sweet spots and windows, the measured points
(noise-limited ones apart), the DC derivatives with the stated window, the what-if curves."""

from __future__ import annotations

import numpy as np
import pytest

from tonebench.analysis.degeneration import degenerate
from tonebench.analysis.transconductance import transconductance
from tonebench.report.bias_page import (
    BiasFinding,
    BiasPageData,
    DcSweep,
    MeasuredIip3,
    dc_figure,
    iip3_figure,
    render_bias_page,
    side_by_side_table,
    temperature_figure,
    what_if_figure,
)
from tonebench.sim.fet import SimFet

TEMP_K = 300.0


@pytest.fixture(scope="module")
def sweep() -> DcSweep:
    fet = SimFet()
    gate_v = np.round(np.arange(0.45, 0.70 + 1e-9, 0.001), 6)
    noise_a = np.random.default_rng(3).normal(0.0, 2e-7, gate_v.size)
    return DcSweep(TEMP_K, gate_v, fet.drain_a(gate_v, TEMP_K) + noise_a, 2e-7, 41, 5)


def _data(sweep: DcSweep, findings: list[BiasFinding], **extra) -> BiasPageData:
    measured = MeasuredIip3(TEMP_K, -20.0, np.array([0.50, 0.56, 0.57, 0.58]), np.array([1.0, 14.0, 31.0, 16.0]),
                            np.array([False, False, True, False]))
    return BiasPageData("Sweet spot: TBF-77 T77-0001", {"Run": "0123abcd"}, [sweep], [measured], findings, **extra)


def test_dc_figure_uses_the_stated_window_and_marks_the_zero(sweep):
    fig = dc_figure(sweep, 0.5698)
    expected = transconductance(sweep.gate_v, sweep.drain_current_a, 2e-7, window_points=41, polyorder=5)
    np.testing.assert_allclose(fig.data[3].y, expected.g3 * 1e3)
    assert "41 points" in fig.layout.title.text
    assert {shape.x0 for shape in fig.layout.shapes if shape.line.dash == "dash"} == {0.5698}  # one per panel


def test_windows_shaded_where_the_findings_put_them(sweep):
    predicted = BiasFinding("dc-prediction", TEMP_K, sweet_spot_v=0.5698, window_threshold_dbm=15.0,
                            window_low_v=0.5640, window_high_v=0.5765)
    measured = BiasFinding("two-tone", TEMP_K, -20.0, sweet_spot_v=0.5705, window_threshold_dbm=15.0,
                           window_low_v=0.5650, window_high_v=0.5760, input_gain_offset_db=-0.4)
    fig = iip3_figure(_data(sweep, [predicted, measured]), TEMP_K)
    spans = sorted((shape.x0, shape.x1) for shape in fig.layout.shapes if shape.type == "rect")
    assert spans == [(0.5640, 0.5765), (0.5650, 0.5760)]
    names = [trace.name for trace in fig.data]
    assert "predicted at the DUT input (-0.40 dB fitted offset)" in names
    at_least = next(trace for trace in fig.data if trace.name.startswith("at least"))
    assert list(at_least.x) == [0.57] and list(at_least.y) == [31.0]
    offset = next(trace for trace in fig.data if trace.name.startswith("predicted at the DUT input"))
    gate = next(trace for trace in fig.data if trace.name.startswith("predicted, gate plane"))
    np.testing.assert_allclose(np.asarray(offset.y) - np.asarray(gate.y), -0.4)


def test_side_by_side_table_gives_both_and_the_difference(sweep):
    table = side_by_side_table(_data(sweep, [
        BiasFinding("dc-prediction", TEMP_K, sweet_spot_v=0.5698, sweet_spot_bound_v=0.0008),
        BiasFinding("two-tone", TEMP_K, sweet_spot_v=0.5710, sweet_spot_bound_v=0.0015)]), TEMP_K)
    assert "0.5698 ± 0.0008" in table and "0.5710 ± 0.0015" in table and "+1.2 mV" in table


def test_what_if_lists_the_moved_sweet_spot(sweep):
    data = _data(sweep, [], what_if_ohm=(("Rs = 2 ohm", 2.0),))
    fig = what_if_figure(data, sweep)
    expected = degenerate(sweep.derivatives(), 2.0)
    assert fig.data[1].name.startswith("Rs = 2 ohm (sweet spot ")
    assert f"{expected.sweet_spot_v[0]:.4f} V" in fig.data[1].name
    np.testing.assert_allclose(fig.data[1].y, expected.iip3_dbm)


def test_temperature_figure_needs_two_temperatures(sweep):
    one = [BiasFinding("two-tone", 300.0, sweet_spot_v=0.57)]
    assert temperature_figure(_data(sweep, one)) is None
    three = [BiasFinding("two-tone", t, sweet_spot_v=v, sweet_spot_bound_v=0.001)
             for t, v in ((250.0, 0.63), (300.0, 0.57), (350.0, 0.51))]
    fig = temperature_figure(_data(sweep, three))
    assert list(fig.data[0].x) == [250.0, 300.0, 350.0] and list(fig.data[0].y) == [0.63, 0.57, 0.51]


def test_page_is_one_document_with_every_section(sweep):
    page = render_bias_page(_data(sweep, [BiasFinding("dc-prediction", TEMP_K, sweet_spot_v=0.5698)],
                                  what_if_ohm=(("Rs = 2 ohm", 2.0),)))
    assert page.count("<html") == 1
    for title in ("Drain current and g1, g2, g3 at 300.0 K", "IIP3 against gate voltage at 300.0 K",
                  "Degeneration what-if at 300.0 K"):
        assert f"<h2>{title}</h2>" in page
