"""Self-contained HTML report of fitted sweeps: one plotly figure per sweep and a results table.

The page shell, stylesheet and file write are report/html.py's (run/start.py imports
check_report_path from here to check --report before measuring).
"""

from __future__ import annotations

import html
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import plotly.graph_objects as go
import plotly.io as pio

from tonebench.analysis.assess import SweepAssessment
from tonebench.analysis.sweep_fit import LATER_CHECK, SweepResult
from tonebench.report.html import check_report_path, page_html, write_html_file
from tonebench.report.run_summary import SweepSummary, summary_figure
from tonebench.units import format_freq

_COLORS = {"fundamental": "#1f5fa8", "im3_lower": "#c0561b", "im3_upper": "#2a8a4a",
           "noise": "#888888", "invalid": "#9a9a9a", "flag": "#c00000"}
_INVALID_NOTE = "outside the valid region"


@dataclass
class SweepPlotData:
    """What one sweep figure shows. Arrays are 1-D, one value per point, DUT-referred dBm.

    pin_dbm is the mean of the two tone input powers, pout_dbm the mean of the two tone output
    powers; noise_dbm the analyzer noise floor at the IM3 frequencies.
    """

    title: str
    pin_dbm: np.ndarray
    pout_dbm: np.ndarray
    im3_lower_dbm: np.ndarray
    im3_upper_dbm: np.ndarray
    noise_dbm: np.ndarray
    valid_mask: np.ndarray
    # The fit and its assessment, live (analysis) or as stored (report/stored_sweeps.py: the
    # same fields). With an assessment, flagged points get a red ring, their flags in the hover text.
    result: SweepResult
    assessment: SweepAssessment | None = None
    # Per point why it was left out of the fit (None: in it), from analysis.sweep_fit.exclusion_reasons.
    exclusions: list[str | None] | None = None

    @property
    def in_fit_words(self) -> str:
        """What a point that meets the valid-region rules is: in the fit, or (a refused fit, e.g. a
        plan at one or two levels) valid with no intercept fitted over it."""
        return "in the fit" if self.result.iip3_dbm is not None else "valid, no intercept fitted"

    def left_out_reasons(self) -> list[str | None]:
        """Per point why it is not in the fit (None: in it); a point a later check left out is
        named by its first flag."""
        if self.exclusions is None:
            return [None if v else _INVALID_NOTE for v in np.asarray(self.valid_mask, dtype=bool)]
        flags = self.assessment.point_flags if self.assessment is not None else [[] for _ in self.exclusions]
        return [f"flagged {flag_label(point_flags[0])}" if why == LATER_CHECK and point_flags else why
                for why, point_flags in zip(self.exclusions, flags)]

    def hover_notes(self) -> list[str]:
        """Per point: 'in the fit' or why not, then each flag with its reason and IIP3 error."""
        notes = [self.in_fit_words if why is None else f"left out: {html.escape(why)}" for why in self.left_out_reasons()]
        if self.assessment is not None:
            for i, flags in enumerate(self.assessment.point_flags):
                for f in flags:
                    err = "" if f.error_db is None else f" (IIP3 error up to {f.error_db:.2f} dB)"
                    notes[i] += f"<br><b>{html.escape(flag_label(f))}</b>: {html.escape(f.detail)}{err}"
        return notes

    def flagged_mask(self) -> np.ndarray:
        if self.assessment is None:
            return np.zeros(np.asarray(self.valid_mask).shape, bool)
        return self.assessment.flagged_mask


def sweep_title(center_freq_hz: float, spacing_hz: float, bias_v: float | None = None,
                temperature_c: float | None = None, lo_dbm: float | None = None) -> str:
    """Figure title for one sweep, e.g. '2.450 GHz, spacing 1 MHz' (', gate 0.5500 V' when biased,
    ', 85.0 degC' in a chamber, ', LO +7.00 dBm' when the plan steps the LO)."""
    bias = "" if bias_v is None else f", gate {bias_v:.4f} V"
    temperature = "" if temperature_c is None else f", {temperature_c:.1f} degC"
    lo = "" if lo_dbm is None else f", LO {lo_dbm:+.2f} dBm"
    return f"{format_freq(center_freq_hz, 3)}, spacing {format_freq(spacing_hz)}{bias}{temperature}{lo}"


def flag_label(flag) -> str:
    """'name (cause)' of an analysis Flag or a stored PointFlag/ResultFlag, or just 'name'."""
    return flag.flag if flag.cause is None else f"{flag.flag} ({flag.cause})"


def flag_text(flag) -> str:
    """One flag (an analysis Flag or a stored PointFlag/ResultFlag) for a table cell:
    'name (cause): detail (IIP3 error up to x dB)'."""
    label = flag_label(flag)
    err = "" if flag.error_db is None else f" (IIP3 error up to {flag.error_db:.2f} dB)"
    return f"{label}: {flag.detail}{err}"


def result_row(center_freq_hz: float, spacing_hz: float, result: SweepResult,
               assessment: SweepAssessment | None = None) -> dict[str, object]:
    """The standard results-table row for one sweep; callers may add columns (bias, device).

    With an assessment the row also carries the IIP3 bound, the lower bound given when noise
    refused the intercept, IIP2, the result's flags and the checks that could not be made.
    """
    row: dict[str, object] = {
        "center": format_freq(center_freq_hz, 3),
        "spacing": format_freq(spacing_hz),
        "gain (dB)": result.gain_db,
        "IIP3 lower (dBm)": result.iip3_lower_dbm,
        "IIP3 upper (dBm)": result.iip3_upper_dbm,
        "IIP3 (dBm)": result.iip3_dbm,
    }
    if assessment is not None:
        a = assessment
        row["+/- (dB)"] = a.iip3_bound_db
        if a.iip3_at_least_dbm is not None:
            row["IIP3 at least (dBm)"] = a.iip3_at_least_dbm
    row.update({
        "OIP3 (dBm)": result.oip3_dbm,
        "IIP3 free slopes (dBm)": result.iip3_free_dbm,
        "slope fundamental": result.slope_fundamental,
        "slope IM3 lower": result.slope_im3_lower,
        "slope IM3 upper": result.slope_im3_upper,
        "P1dB in, per tone (dBm)": result.p1db_in_dbm,
        "P1dB out, per tone (dBm)": result.p1db_out_dbm,
        "valid points": f"{result.n_valid} of {result.n_points}",
        "reason": result.reason,
    })
    if assessment is not None:
        second = assessment.second_order
        if second is not None:
            row["IIP2 (dBm)"] = second.iip2_dbm
            row["IIP2 +/- (dB)"] = second.bound_db
            row["slope IM2"] = second.slope_im2
        row["flags"] = "; ".join(flag_text(f) for f in assessment.result_flags) or "none"
        row["checks not made"] = "; ".join(assessment.notes) or None
    return row


# Each product its own colour and symbol; filled: in the fit, open: left out (one legend entry
# per reason), a red ring: flagged (its flags on hover).
_SERIES = {"fundamental": ("fundamental", "circle"), "im3_lower": ("IM3 lower (2f1-f2)", "triangle-down"),
           "im3_upper": ("IM3 upper (2f2-f1)", "triangle-up")}


def _point_traces(series: str, x, y, sweep: SweepPlotData) -> list[go.Scatter]:
    """One product's points: those in the fit, then those left out grouped by reason."""
    name, symbol = _SERIES[series]
    color = _COLORS[series]
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    notes = np.array(sweep.hover_notes(), dtype=object)
    reasons = sweep.left_out_reasons()
    template = "%{x:.2f} dBm in, %{y:.2f} dBm out<br>%{hovertext}<extra>" + name + "</extra>"
    in_fit = np.array([r is None for r in reasons])
    traces = [go.Scatter(x=x[in_fit], y=y[in_fit], name=f"{name}, {sweep.in_fit_words}", mode="markers", legendgroup=series,
                         marker=dict(size=9, color=color, symbol=symbol), hovertext=notes[in_fit],
                         hovertemplate=template)]
    for reason in dict.fromkeys(r for r in reasons if r is not None):
        keep = np.array([r == reason for r in reasons])
        traces.append(go.Scatter(x=x[keep], y=y[keep], name=f"left out: {reason}", mode="markers",
                                 legendgroup=f"left out: {reason}", showlegend=series == "fundamental",
                                 marker=dict(size=9, color=_COLORS["invalid"], symbol=f"{symbol}-open",
                                             line=dict(width=1.5)),
                                 hovertext=notes[keep], hovertemplate=template))
    return traces


def _flag_rings(sweep: SweepPlotData) -> go.Scatter | None:
    """A red ring around both IM3 points of every flagged point."""
    flagged = np.asarray(sweep.flagged_mask(), dtype=bool)
    if not flagged.any():
        return None
    pin = np.asarray(sweep.pin_dbm, dtype=float)[flagged]
    notes = np.array(sweep.hover_notes(), dtype=object)[flagged]
    return go.Scatter(x=np.concatenate([pin, pin]),
                      y=np.concatenate([np.asarray(sweep.im3_lower_dbm, dtype=float)[flagged],
                                        np.asarray(sweep.im3_upper_dbm, dtype=float)[flagged]]),
                      name="flagged (reason on hover)", mode="markers",
                      marker=dict(size=17, color=_COLORS["flag"], symbol="circle-open", line=dict(width=2)),
                      hovertext=np.concatenate([notes, notes]),
                      hovertemplate="%{x:.2f} dBm in<br>%{hovertext}<extra>flagged</extra>")


def _line(name: str, color: str, x0: float, x1: float, slope: float, x_ref: float, y_ref: float):
    x = np.array([x0, x1])
    return go.Scatter(x=x, y=y_ref + slope * (x - x_ref), name=name, mode="lines",
                      line=dict(color=color, dash="dash", width=1.5), hoverinfo="skip")


def sweep_figure(sweep: SweepPlotData) -> go.Figure:
    """Output versus input power: measured points, fitted slope-1 and slope-3 lines, intercepts."""
    r = sweep.result
    fig = go.Figure()
    for series, y in (("fundamental", sweep.pout_dbm), ("im3_lower", sweep.im3_lower_dbm),
                      ("im3_upper", sweep.im3_upper_dbm)):
        for trace in _point_traces(series, sweep.pin_dbm, y, sweep):
            fig.add_trace(trace)
    rings = _flag_rings(sweep)
    if rings is not None:
        fig.add_trace(rings)
    fig.add_trace(go.Scatter(x=np.asarray(sweep.pin_dbm, dtype=float),
                             y=np.asarray(sweep.noise_dbm, dtype=float), name="noise floor in the point's RBW",
                             mode="markers", marker=dict(symbol="x-thin-open", size=8,
                                                         color=_COLORS["noise"])))

    pin = np.asarray(sweep.pin_dbm, dtype=float)
    x0 = float(np.nanmin(pin)) if np.isfinite(pin).any() else None
    intercepts = [(label, color, iip3, oip3) for label, color, iip3, oip3 in (
        ("lower", _COLORS["im3_lower"], r.iip3_lower_dbm, r.oip3_lower_dbm),
        ("upper", _COLORS["im3_upper"], r.iip3_upper_dbm, r.oip3_upper_dbm)) if iip3 is not None]
    if x0 is not None and r.gain_db is not None:
        # Lines run from the lowest point out to the farthest intercept (or the last point).
        x1 = max([float(np.nanmax(pin))] + [iip3 for _, _, iip3, _ in intercepts])
        fig.add_trace(_line(f"slope 1, gain {r.gain_db:.2f} dB", _COLORS["fundamental"],
                            x0, x1, 1.0, 0.0, r.gain_db))
        # Slope-3 lines start at the fitted region, not at products buried in the noise.
        valid = np.asarray(sweep.valid_mask, dtype=bool) & np.isfinite(pin)
        x0_fit = float(pin[valid].min()) if valid.any() else x0
        bound_db = None if sweep.assessment is None else sweep.assessment.iip3_bound_db
        for label, color, iip3, oip3 in intercepts:
            fig.add_trace(_line(f"slope 3, {label}", color, x0_fit, iip3, 3.0, iip3, oip3))
            fig.add_trace(go.Scatter(
                x=[iip3], y=[oip3], mode="markers", name=f"intercept {label}",
                marker=dict(symbol="star", size=12, color=color),
                error_x=None if bound_db is None else dict(type="constant", value=bound_db, color=color),
                hovertext=[_intercept_text(label, iip3, oip3)], hoverinfo="text"))
            # Lower above, upper below the stars (they often coincide), both to the right.
            fig.add_annotation(x=iip3, y=oip3, text=_intercept_text(label, iip3, oip3), showarrow=False,
                               xanchor="left", xshift=10, yshift=12 if label == "lower" else -12,
                               font=dict(color=color, size=11))
        if valid.any():
            fig.add_vrect(x0=float(pin[valid].min()), x1=float(pin[valid].max()), fillcolor="rgba(90, 90, 90, 0.07)",
                          line_width=0, layer="below",
                          annotation_text="fitted region" if r.iip3_dbm is not None else "valid region, no fit",
                          annotation_position="top left", annotation_font=dict(size=10, color="#666"))
    fig.update_layout(
        title=sweep.title, template="plotly_white", height=480,
        xaxis_title="input power per tone at the DUT (dBm)",
        yaxis_title="output power at the DUT (dBm)",
        legend=dict(orientation="h", y=-0.2),
    )
    if x0 is not None and intercepts:
        # Room to the right of the farthest intercept for its label: about 40 % of the span on a
        # figure of the page's width (a label is about a quarter of the plot wide).
        right_dbm = max(iip3 for _, _, iip3, _ in intercepts)
        fig.update_xaxes(range=[x0 - 2.0, right_dbm + max(12.0, 0.45 * (right_dbm - x0))])
    return fig


def _intercept_text(label: str, iip3: float, oip3: float) -> str:
    return f"{label}: IIP3 {iip3:.2f} dBm, OIP3 {oip3:.2f} dBm"


def _cell(value: object) -> str:
    if value is None:
        return '<td class="num">&ndash;</td>'
    if isinstance(value, (float, np.floating)):
        return f'<td class="num">{value:.2f}</td>'
    return f"<td>{html.escape(str(value))}</td>"


# The results table holds what a reader compares; the rest of a row goes in the diagnostics table.
_DIAGNOSTIC_COLUMNS = ("IIP3 free slopes (dBm)", "slope fundamental", "slope IM3 lower", "slope IM3 upper",
                       "slope IM2", "reason", "checks not made")


def _table(rows: list[dict[str, object]], css_class: str) -> str:
    columns: list[str] = []
    for row in rows:
        columns += [key for key in row if key not in columns]
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in columns)
    body = "\n".join("<tr>" + "".join(_cell(row.get(c)) for c in columns) + "</tr>" for row in rows)
    return f'<table class="{css_class}">\n<thead><tr>{head}</tr></thead>\n<tbody>\n{body}\n</tbody>\n</table>'


def _results_table(rows: list[dict[str, object]]) -> str:
    """The results, then (under its own heading) the fit diagnostics of the same sweeps, each
    diagnostics row led by the sweep's conditions so the two tables read side by side."""
    conditions = ("LO (dBm)", "temperature (degC)", "bias (V)", "center", "spacing")
    main = [{k: v for k, v in row.items() if k not in _DIAGNOSTIC_COLUMNS} for row in rows]
    diagnostics = [{**{k: row[k] for k in conditions if k in row},
                    **{k: row[k] for k in _DIAGNOSTIC_COLUMNS if k in row}} for row in rows]
    html_text = _table(main, "results")
    if any(key in _DIAGNOSTIC_COLUMNS for d in diagnostics for key in d):
        html_text += "\n<h2>Fit diagnostics</h2>\n" + _table(diagnostics, "diagnostics")
    return html_text


# Above this many sweeps the per-sweep figures sit behind the summary, folded.
FOLD_SWEEPS_ABOVE = 6
# A figure drawn while folded has no width: redraw each when its fold opens.
_RESIZE_ON_OPEN = """<script>
document.querySelectorAll("details.sweeps").forEach(function (fold) {
  fold.addEventListener("toggle", function () {
    fold.querySelectorAll(".plotly-graph-div").forEach(function (div) { Plotly.Plots.resize(div); });
  });
});
</script>"""


def _figure_div(fig: go.Figure, div_id: str, css_class: str) -> str:
    return (f'<div class="{css_class}">' + pio.to_html(fig, full_html=False, include_plotlyjs=False, div_id=div_id,
                                                     config={"displaylogo": False}) + "</div>")


def render_report(heading: str, summary_rows: list[dict[str, str]], sweeps: list[SweepPlotData],
                  result_rows: list[dict[str, object]], summaries: list[SweepSummary] | None = None,
                  archive: str = "") -> str:
    """The whole page as one string. Each summary row is {"label": ..., "value": ...}; with
    `summaries` (one per sweep) a figure of every sweep's intercepts comes first; `archive` (HTML,
    report/run_archive.py) closes the page."""
    summary = "\n".join(f"<dt>{html.escape(str(row['label']))}</dt>"
                        f"<dd>{html.escape(str(row['value']))}</dd>" for row in summary_rows)
    overview = summary_figure(summaries or [])
    overview_html = "" if overview is None else "<h2>Summary</h2>\n" + _figure_div(overview, "summary", "figure")
    figures = "\n".join(_figure_div(sweep_figure(s), f"sweep-{i}", "sweep") for i, s in enumerate(sweeps, start=1))
    if len(sweeps) > FOLD_SWEEPS_ABOVE:
        figures = (f'<details class="sweeps"><summary>{len(sweeps)} sweeps, one figure each (open to show)</summary>\n'
                   f"{figures}\n</details>\n{_RESIZE_ON_OPEN}")
    body = f"""<header>
<h1>{html.escape(heading)}</h1>
<dl class="summary">
{summary}
</dl>
</header>
{overview_html}
<h2>Sweeps</h2>
{figures}
<h2>Results</h2>
{_results_table(result_rows)}
{archive}"""
    return page_html(heading, body)


def write_report(path: Path, heading: str, summary_rows: list[dict[str, str]],
                 sweeps: list[SweepPlotData], result_rows: list[dict[str, object]],
                 summaries: list[SweepSummary] | None = None, archive: str = "") -> Path:
    """Write the report to path atomically (report/html.py write_html_file); returns the path."""
    check_report_path(path)
    page = render_report(heading, summary_rows, sweeps, result_rows, summaries, archive)  # fails before touching disk
    return write_html_file(path, page)
