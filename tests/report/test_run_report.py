"""HTML report: self-contained page, one figure per sweep, escaped results table, atomic write."""

import html
import re

import numpy as np
import pytest
from plotly.offline import get_plotlyjs

from tonebench.analysis import fit_sweep
from tonebench.errors import InputError
from tonebench.report.run_report import SweepPlotData, result_row, sweep_title, write_report


def _sweep(center_freq_hz, spacing_hz, iip3_dbm, n_points=12):
    tone = np.linspace(-50.0, -17.0, n_points)
    gain_db = 18.0
    pout = tone + gain_db - np.where(tone > -22.0, 1.5, 0.0)  # top points compressed
    noise = np.full(n_points, -95.0)
    # Analyzer readings: the product (3P - 2 IIP3 + G) and the noise floor, powers adding.
    lower = 10 * np.log10(10 ** ((3 * tone - 2 * iip3_dbm + gain_db) / 10) + 10 ** (noise / 10))
    upper = 10 * np.log10(10 ** ((3 * tone - 2 * iip3_dbm + gain_db - 0.4) / 10) + 10 ** (noise / 10))
    result = fit_sweep(tone, tone, tone, pout, pout, lower, upper, noise, noise,
                       np.zeros(n_points, bool))
    plot = SweepPlotData(title=sweep_title(center_freq_hz, spacing_hz), pin_dbm=tone,
                         pout_dbm=pout, im3_lower_dbm=lower, im3_upper_dbm=upper,
                         noise_dbm=noise, valid_mask=result.valid_mask, result=result)
    return plot, result_row(center_freq_hz, spacing_hz, result)


@pytest.fixture
def report(tmp_path):
    sweeps, rows = zip(*[_sweep(2.45e9, 1e6, 4.0), _sweep(5.8e9, 100e3, 7.5),
                         _sweep(0.9e9, 10e6, 2.0, n_points=4)])
    path = write_report(tmp_path / "run.html", "Run <7> & friends",
                        [{"label": "Run", "value": "0b6f2a1c-0000-4000-8000-000000000001"},
                         {"label": "Device", "value": "LNA-7 <a>"}],
                        list(sweeps), list(rows))
    return path, path.read_text(encoding="utf-8"), rows, [s.result for s in sweeps]


def test_report_is_self_contained(report):
    path, page, _, _ = report
    assert path.exists()
    # plotly.js itself is embedded (its full source, once) and no script is fetched from anywhere.
    bundle = get_plotlyjs()
    assert page.count(bundle) == 1
    assert not re.search(r"<script[^>]*\ssrc\s*=", page, flags=re.IGNORECASE)
    # The plotly.js bundle carries one default map-data URL on cdn.plot.ly (only used by map
    # plots); no other mention of that CDN may appear in the page.
    assert page.count("cdn.plot.ly") == bundle.count("cdn.plot.ly")
    assert page.replace(bundle, "").count("http://") == 0
    assert "https://" not in page.replace(bundle, "")


def test_report_has_one_plot_per_sweep_and_table_values(report):
    _, page, rows, results = report
    assert len(re.findall(r'class="plotly-graph-div"', page)) == 3
    for i in (1, 2, 3):
        assert f'id="sweep-{i}"' in page
    assert "2.450 GHz, spacing 1 MHz" in page and "5.800 GHz, spacing 100 kHz" in page
    # The data were built for IIP3 4.0 and 7.5 dBm (lower IM3; upper is 0.4 dB lower, so
    # +0.2 dB); noise left in readings >= 20 dB over the floor biases by < 0.022 dB.
    assert results[0].iip3_lower_dbm == pytest.approx(4.0, abs=0.022)
    assert results[1].iip3_lower_dbm == pytest.approx(7.5, abs=0.022)
    for r in results[:2]:
        for value in (r.gain_db, r.iip3_lower_dbm, r.iip3_upper_dbm, r.iip3_dbm, r.oip3_dbm,
                      r.slope_im3_lower, r.p1db_in_dbm):
            assert value is not None and f'<td class="num">{value:.2f}</td>' in page
        assert f"<td>{r.n_valid} of 12</td>" in page
    # The short sweep has no intercept, and its reason is in the table.
    assert rows[2]["IIP3 (dBm)"] is None and results[2].reason is not None
    assert "only 1 of 4 points meets the valid-region rules" in page
    assert "<td>" + results[2].reason + "</td>" in page


def test_report_escapes_text(report):
    _, page, _, _ = report
    assert "Run &lt;7&gt; &amp; friends" in page and "Run <7>" not in page
    assert "<dt>Device</dt><dd>LNA-7 &lt;a&gt;</dd>" in page


def test_failed_write_keeps_old_report(tmp_path):
    class Unprintable:
        def __str__(self):
            raise RuntimeError("boom")

    plot, row = _sweep(2.45e9, 1e6, 4.0)
    path = write_report(tmp_path / "r.html", "first", [], [plot], [row])
    before = path.read_bytes()
    with pytest.raises(RuntimeError):
        write_report(path, "second", [], [plot], [{**row, "note": Unprintable()}])
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["r.html"]  # no temp file left behind


def test_missing_directory_is_input_error(tmp_path):
    plot, row = _sweep(2.45e9, 1e6, 4.0)
    with pytest.raises(InputError, match="does not exist"):
        write_report(tmp_path / "nowhere" / "r.html", "x", [], [plot], [row])


# --- flags and bounds -----------------------------------------------------------------------

def _flagged_sweep():
    """A sweep whose lowest points sit in the noise and whose sources add a residual 14 dB down."""
    from tonebench.analysis import AnalysisSettings, SweepData, assess_sweep

    tone = np.arange(-50.0, -24.0, 2.0)
    n = tone.size
    gain_db, iip3_dbm, system_ip3_dbm = 15.0, 0.0, 7.0
    pout = tone + gain_db
    noise = np.full(n, -112.0)
    # Device and residual in phase (amplitudes add), then the noise in power.
    dut_v = 10 ** ((3 * tone - 2 * iip3_dbm + gain_db) / 20)
    residual_v = 10 ** ((3 * tone - 2 * system_ip3_dbm + gain_db) / 20)
    im3 = 10 * np.log10((dut_v + residual_v) ** 2 + 10 ** (noise / 10))
    data = SweepData(tone, tone, tone, pout, pout, im3, im3, noise, noise, np.zeros(n, bool))
    assessment = assess_sweep(data, AnalysisSettings(system_ip3_dbm=system_ip3_dbm))
    plot = SweepPlotData(title="flagged", pin_dbm=tone, pout_dbm=pout, im3_lower_dbm=im3, im3_upper_dbm=im3,
                         noise_dbm=noise, valid_mask=assessment.fit.valid_mask, result=assessment.fit,
                         assessment=assessment)
    return plot, assessment


def _trace(fig, name: str):
    return next(trace for trace in fig.data if trace.name == name)


def test_flagged_points_drawn_distinctly_with_reasons():
    from tonebench.report.run_report import sweep_figure

    plot, assessment = _flagged_sweep()
    noisy = np.array(["analyzer-limited (noise)" in [f.label for f in p] for p in assessment.point_flags])
    assert noisy[:3].all() and not noisy[-3:].any()
    fig = sweep_figure(plot)
    valid = assessment.fit.valid_mask
    in_fit = _trace(fig, "IM3 lower (2f1-f2), in the fit")
    assert list(in_fit.x) == list(plot.pin_dbm[valid]) and in_fit.marker.symbol == "triangle-down"
    left_out = [t for t in fig.data if t.name.startswith("left out") and t.marker.symbol == "triangle-down-open"]
    assert sorted(x for t in left_out for x in t.x) == sorted(plot.pin_dbm[~valid])
    # Every point carries the source-intermod flag here: a red ring around both IM3 points of each.
    rings = _trace(fig, "flagged (reason on hover)")
    assert rings.marker.symbol == "circle-open" and rings.marker.color == "#c00000"
    assert len(rings.x) == 2 * len(plot.pin_dbm)
    hover = list(rings.hovertext)
    for i, flags in enumerate(assessment.point_flags):
        assert flags
        for f in flags:
            assert f.label in hover[i] and html.escape(f.detail) in hover[i]
    assert "IM3 only" in hover[len(plot.pin_dbm) - 1] and "residual" in hover[len(plot.pin_dbm) - 1]


def test_left_out_points_say_why_in_legend_and_hover():
    from tonebench.analysis.sweep_fit import IM3_OVER_NOISE_MIN_DB, exclusion_reasons
    from tonebench.report.run_report import sweep_figure

    plot, assessment = _flagged_sweep()
    arrays = dict(tone_dbm=plot.pin_dbm, pin1_dbm=plot.pin_dbm, pin2_dbm=plot.pin_dbm, pout_f1_dbm=plot.pout_dbm,
                  pout_f2_dbm=plot.pout_dbm, im3_lower_dbm=plot.im3_lower_dbm, im3_upper_dbm=plot.im3_upper_dbm,
                  noise_lower_dbm=plot.noise_dbm, noise_upper_dbm=plot.noise_dbm,
                  overload=np.zeros(plot.pin_dbm.size, bool))
    reasons = exclusion_reasons(arrays, assessment.fit.valid_mask)
    # The rule itself, outside the code under test: IM3 less than the margin above the floor.
    near_floor = plot.im3_lower_dbm - plot.noise_dbm < IM3_OVER_NOISE_MIN_DB
    assert near_floor.any()
    for i, why in enumerate(reasons):
        if near_floor[i]:
            assert why == f"IM3 within {IM3_OVER_NOISE_MIN_DB:g} dB of the noise floor"
        elif assessment.fit.valid_mask[i]:
            assert why is None
    plot.exclusions = reasons
    fig = sweep_figure(plot)
    entry = _trace(fig, f"left out: IM3 within {IM3_OVER_NOISE_MIN_DB:g} dB of the noise floor")
    assert entry.showlegend in (None, True) and "left out: IM3 within" in entry.hovertext[0]
    shaded = [shape for shape in fig.layout.shapes if shape.type == "rect"]
    valid_pin = plot.pin_dbm[assessment.fit.valid_mask]
    assert [(s.x0, s.x1) for s in shaded] == [(valid_pin.min(), valid_pin.max())]


def test_results_table_has_bound_and_flags(tmp_path):
    plot, assessment = _flagged_sweep()
    row = result_row(2.45e9, 1e6, assessment.fit, assessment)
    assert row["+/- (dB)"] == assessment.iip3_bound_db and row["+/- (dB)"] > 0.5
    assert row["flags"].startswith("source-intermod-limited: ")
    page = write_report(tmp_path / "f.html", "flags", [], [plot], [row]).read_text(encoding="utf-8")
    assert f'<td class="num">{assessment.iip3_bound_db:.2f}</td>' in page
    assert "<th>+/- (dB)</th>" in page and "<th>flags</th>" in page
    assert html.escape(row["flags"]) in page
    # Truth (0 dBm) within the reported bound: the residual is what the bound is made of.
    assert abs(assessment.fit.iip3_dbm - 0.0) <= assessment.iip3_bound_db


def test_diagnostics_rows_carry_the_lo_level_of_their_sweep():
    """Sweeps that differ only in LO power must be told apart in the diagnostics table too."""
    from tonebench.report.run_report import _results_table

    rows = [{"LO (dBm)": lo, "center": "2.450 GHz", "spacing": "2 MHz", "IIP3 (dBm)": iip3, "reason": "-"}
            for lo, iip3 in (("+9.00", 11.94), ("+5.00", 5.94))]
    page = _results_table(rows)
    diagnostics = page.split("<h2>Fit diagnostics</h2>")[1]
    assert "<th>LO (dBm)</th>" in diagnostics and "+9.00" in diagnostics and "+5.00" in diagnostics
    # Conditions alone are no diagnostics: no second table.
    assert "Fit diagnostics" not in _results_table([{k: v for k, v in r.items() if k != "reason"} for r in rows])
