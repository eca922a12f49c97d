"""The run report's summary figure and the folding of many sweeps."""

from __future__ import annotations

import dataclasses

import numpy as np

from tonebench.analysis.sweep_fit import fit_sweep
from tonebench.report.run_report import FOLD_SWEEPS_ABOVE, SweepPlotData, render_report, sweep_title
from tonebench.report.run_summary import SweepSummary, summary_figure


def _summary(center_hz, spacing_hz=1e6, bias_v=None, iip3=-2.0, delta=0.1, bound=0.2) -> SweepSummary:
    return SweepSummary(center_hz, spacing_hz, bias_v, iip3 - delta, iip3 + delta, iip3, iip3 + 15 - delta,
                        iip3 + 15 + delta, iip3 + 15, bound)


def _trace(fig, name):
    return [t for t in fig.data if t.name == name]


def test_nothing_stepped_gives_no_summary():
    assert summary_figure([_summary(2.45e9)]) is None
    assert summary_figure([]) is None


def test_frequency_is_the_axis_and_bias_the_families():
    sweeps = [_summary(c, bias_v=b, iip3=-2.0 + 10 * b) for c in (2.40e9, 2.45e9) for b in (0.5, 0.6)]
    fig = summary_figure(sweeps)
    assert fig.layout.xaxis.title.text == "center frequency (GHz)"
    lower = _trace(fig, "lower (bias 0.5000 V)")
    assert len(lower) == 2  # IIP3 and OIP3 panels
    np.testing.assert_allclose(lower[0].x, [2.40, 2.45])
    np.testing.assert_allclose(lower[0].y, [2.9, 2.9])
    mean = _trace(fig, "mean of lower and upper, ± bound (bias 0.6000 V)")[0]
    np.testing.assert_allclose(mean.y, [4.0, 4.0])
    assert list(mean.error_y.array) == [0.2, 0.2]
    # Each family's mean line is named at its last point, in both panels.
    labels = sorted((a.text, a.x, a.y) for a in fig.layout.annotations if a.text.startswith("bias"))
    assert labels == [("bias 0.5000 V", 2.45, 3.0), ("bias 0.5000 V", 2.45, 18.0),
                      ("bias 0.6000 V", 2.45, 4.0), ("bias 0.6000 V", 2.45, 19.0)]


def test_bias_alone_is_the_axis():
    fig = summary_figure([_summary(2.45e9, bias_v=b) for b in (0.50, 0.55, 0.60)])
    assert fig.layout.xaxis.title.text == "gate bias (V)"
    assert [a.text for a in fig.layout.annotations] == ["IIP3", "OIP3"]  # one family: no line names
    assert list(_trace(fig, "upper")[0].x) == [0.50, 0.55, 0.60]


def test_lo_power_alone_is_the_axis_in_rising_order():
    # A mixer plan stepping [mixer] lo_levels_dbm (plan order 9 .. 1 dBm): IIP3 against LO power.
    sweeps = [dataclasses.replace(_summary(2.45e9, iip3=12.0 - 3.0 * max(0.0, 7.0 - lo)), lo_dbm=lo)
              for lo in (9.0, 7.0, 5.0, 3.0, 1.0)]
    fig = summary_figure(sweeps)
    assert fig.layout.xaxis.title.text == "LO power (dBm)"
    mean = _trace(fig, "mean of lower and upper, ± bound")[0]
    assert list(mean.x) == [1.0, 3.0, 5.0, 7.0, 9.0]
    np.testing.assert_allclose(mean.y, [-6.0, 0.0, 6.0, 12.0, 12.0])
    assert sweep_title(2.45e9, 2e6, lo_dbm=3.0) == "2.450 GHz, spacing 2 MHz, LO +3.00 dBm"


def _plot(index: int) -> SweepPlotData:
    pin = np.arange(-40.0, -28.0, 2.0)
    im3 = 3 * pin + 12.0
    noise = np.full(pin.size, -140.0)
    fit = fit_sweep(pin, pin, pin, pin + 12.0, pin + 12.0, im3, im3, noise, noise, np.zeros(pin.size, bool))
    return SweepPlotData(sweep_title(2.4e9 + index * 1e7, 1e6, 0.55), pin, pin + 12.0, im3, im3, noise,
                         fit.valid_mask, fit)


def test_many_sweeps_fold_behind_the_summary():
    few = render_report("r", [], [_plot(i) for i in range(FOLD_SWEEPS_ABOVE)], [])
    assert '<details class="sweeps">' not in few
    many = render_report("r", [], [_plot(i) for i in range(FOLD_SWEEPS_ABOVE + 1)], [],
                         [_summary(2.4e9 + i * 1e7) for i in range(FOLD_SWEEPS_ABOVE + 1)])
    assert f"{FOLD_SWEEPS_ABOVE + 1} sweeps, one figure each" in many
    assert many.index("<h2>Summary</h2>") < many.index('<details class="sweeps">')
    assert "gate 0.5500 V" in many
