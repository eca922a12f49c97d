"""The bias page of a sweet-spot run: drain current and g1, g2, g3 against gate voltage with the
g3 zero marked; predicted and measured IIP3 against gate voltage with the window shaded; the
degeneration what-if; the sweet spot against temperature; predicted and measured side by side.

Built from plain data (what the store holds for the run: its DC sweeps, the measured IIP3 per
gate voltage at the search's drive level, and its bias results), so the page never re-decides
anything: the curves come from the same Savitzky-Golay derivatives the prediction used
(analysis/transconductance.py) and every marked value is a stored result.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

import numpy as np
import plotly.graph_objects as go
import plotly.io as pio
from plotly.subplots import make_subplots

from tonebench.analysis.degeneration import degenerate
from tonebench.analysis.transconductance import capped_iip3_dbm, transconductance
from tonebench.report.html import page_html

# Our own colours: predicted in slate blue, measured in dark orange, windows in a pale wash of each.
PREDICTED_COLOR = "#3b5b92"
MEASURED_COLOR = "#c0561b"
PREDICTED_WASH = "rgba(59, 91, 146, 0.10)"
MEASURED_WASH = "rgba(192, 86, 27, 0.14)"
WHAT_IF_COLORS = ("#2e7d5b", "#7a4f9a", "#8a6d1f", "#4a7f8c")


@dataclass(frozen=True)
class DcSweep:
    """One DC transfer sweep: drain current against gate voltage at a fixed drain voltage."""

    temperature_k: float | None
    gate_v: np.ndarray
    drain_current_a: np.ndarray
    current_sigma_a: float  # 1-sigma scatter of one current reading
    # The Savitzky-Golay window and order the stored prediction used (its method), so the page
    # draws the same derivatives.
    window_points: int = 11
    polyorder: int = 5

    def derivatives(self):
        return transconductance(self.gate_v, self.drain_current_a, self.current_sigma_a,
                                window_points=self.window_points, polyorder=self.polyorder)


@dataclass(frozen=True)
class MeasuredIip3:
    """Per-point IIP3 at the search's stated drive, one value per gate voltage (one temperature).
    at_least marks a reading whose IM3 sat at the noise floor: the IIP3 is at least that."""

    temperature_k: float | None
    drive_tone_dbm: float
    gate_v: np.ndarray
    iip3_dbm: np.ndarray
    at_least: np.ndarray


@dataclass(frozen=True)
class BiasFinding:
    """One stored bias result (kind "dc-prediction" or "two-tone"); None where it has no value."""

    kind: str
    temperature_k: float | None = None
    drive_tone_dbm: float | None = None
    sweet_spot_v: float | None = None
    sweet_spot_bound_v: float | None = None
    peak_iip3_dbm: float | None = None
    peak_iip3_bound_db: float | None = None
    window_threshold_dbm: float | None = None
    window_low_v: float | None = None
    window_low_bound_v: float | None = None
    window_high_v: float | None = None
    window_high_bound_v: float | None = None
    drain_current_a: float | None = None
    gain_db: float | None = None
    input_gain_offset_db: float | None = None

    @property
    def window_width_v(self) -> float | None:
        if self.window_low_v is None or self.window_high_v is None:
            return None
        return self.window_high_v - self.window_low_v


@dataclass(frozen=True)
class BiasPageData:
    title: str
    summary: dict[str, str]
    dc_sweeps: list[DcSweep] = field(default_factory=list)
    measured: list[MeasuredIip3] = field(default_factory=list)
    findings: list[BiasFinding] = field(default_factory=list)
    # Source degeneration impedances (ohm, complex for an inductor at the measured frequency) to draw.
    what_if_ohm: tuple[tuple[str, complex], ...] = ()
    source_ohm: float = 50.0


def _temp_label(temp_k: float | None) -> str:
    return "" if temp_k is None else f" at {temp_k:.1f} K"


def _finding(data: BiasPageData, kind: str, temp_k: float | None) -> BiasFinding | None:
    for finding in data.findings:
        if finding.kind == kind and finding.temperature_k == temp_k:
            return finding
    return None


def _figure_html(fig: go.Figure, div_id: str) -> str:
    return ('<div class="figure">' + pio.to_html(fig, full_html=False, include_plotlyjs=False, div_id=div_id,
                                                 config={"displaylogo": False}) + "</div>")


def dc_figure(sweep: DcSweep, zero_v: float | None) -> go.Figure:
    """Id, g1, g2, g3 stacked against gate voltage; the predicted g3 zero as a dashed line."""
    result = sweep.derivatives()
    fig = make_subplots(rows=4, cols=1, shared_xaxes=True, vertical_spacing=0.04,
                        subplot_titles=("drain current", "g1 = dId/dVgs", "g2 = (1/2) d2Id/dVgs2",
                                        "g3 = (1/6) d3Id/dVgs3"))
    rows = ((sweep.gate_v, sweep.drain_current_a * 1e3, "Id (mA)", None),
            (result.gate_v, result.g1 * 1e3, "g1 (mS)", result.sigma_g1 * 1e3),
            (result.gate_v, result.g2 * 1e3, "g2 (mA/V²)", result.sigma_g2 * 1e3),
            (result.gate_v, result.g3 * 1e3, "g3 (mA/V³)", result.sigma_g3 * 1e3))
    for row, (x, y, title, sigma) in enumerate(rows, start=1):
        hover = "%{x:.4f} V: %{y:.4g}" + ("" if sigma is None else f" ± {sigma:.2g} (1σ)")
        fig.add_trace(go.Scatter(x=x, y=y, mode="lines", line=dict(color=PREDICTED_COLOR), showlegend=False,
                                 hovertemplate=hover + "<extra></extra>"), row=row, col=1)
        fig.update_yaxes(title_text=title, row=row, col=1)
    fig.add_hline(y=0.0, line=dict(color="#888", width=1), row=4, col=1)
    if zero_v is not None:
        fig.add_vline(x=zero_v, line=dict(color=MEASURED_COLOR, dash="dash"))
        fig.add_annotation(x=zero_v, y=0.0, row=4, col=1, text=f"g3 = 0 at {zero_v:.4f} V", showarrow=True,
                           arrowhead=2, ax=60, ay=-30, font=dict(color=MEASURED_COLOR))
    fig.update_xaxes(title_text="gate voltage (V)", row=4, col=1)
    fig.update_layout(template="plotly_white", height=760, margin=dict(l=70, r=30, t=40, b=50),
                      title=f"DC transfer{_temp_label(sweep.temperature_k)} (Savitzky-Golay, "
                            f"{result.window_points} points, order {result.polyorder}, step "
                            f"{result.step_v * 1e3:.2f} mV)")
    return fig


def _shade_window(fig: go.Figure, finding: BiasFinding | None, wash: str, label: str, position: str) -> None:
    if finding is None or finding.window_width_v is None:
        return
    fig.add_vrect(x0=finding.window_low_v, x1=finding.window_high_v, fillcolor=wash, line_width=0, layer="below",
                  annotation_text=f"{label} window {finding.window_width_v * 1e3:.1f} mV",
                  annotation_position=position, annotation_font_size=10)


def iip3_figure(data: BiasPageData, temp_k: float | None) -> go.Figure:
    """Predicted (gate plane, and moved by the fitted input offset) and measured IIP3 against
    gate voltage; both windows shaded, the threshold drawn, the sweet spots marked."""
    fig = go.Figure()
    predicted = _finding(data, "dc-prediction", temp_k)
    measured = _finding(data, "two-tone", temp_k)
    for sweep in (s for s in data.dc_sweeps if s.temperature_k == temp_k):
        result = sweep.derivatives()
        gate_iip3_dbm = capped_iip3_dbm(result, data.source_ohm)
        fig.add_trace(go.Scatter(x=result.gate_v, y=gate_iip3_dbm, mode="lines", name="predicted, gate plane (DC)",
                                 line=dict(color=PREDICTED_COLOR, dash="dot"),
                                 hovertemplate="%{x:.4f} V: %{y:.2f} dBm<extra>predicted</extra>"))
        offset_db = None if measured is None else measured.input_gain_offset_db
        if offset_db is not None:
            fig.add_trace(go.Scatter(x=result.gate_v, y=gate_iip3_dbm + offset_db, mode="lines",
                                     name=f"predicted at the DUT input ({offset_db:+.2f} dB fitted offset)",
                                     line=dict(color=PREDICTED_COLOR),
                                     hovertemplate="%{x:.4f} V: %{y:.2f} dBm<extra>predicted + offset</extra>"))
    for curve in (m for m in data.measured if m.temperature_k == temp_k):
        for at_least, name, symbol in ((False, f"measured at {curve.drive_tone_dbm:+.1f} dBm per tone", "circle"),
                                       (True, "at least (IM3 at the noise floor)", "triangle-up-open")):
            keep = curve.at_least == at_least
            if keep.any():
                fig.add_trace(go.Scatter(x=curve.gate_v[keep], y=curve.iip3_dbm[keep], mode="markers", name=name,
                                         marker=dict(color=MEASURED_COLOR, symbol=symbol, size=9),
                                         hovertemplate="%{x:.4f} V: %{y:.2f} dBm<extra></extra>"))
    _shade_window(fig, predicted, PREDICTED_WASH, "predicted", "bottom right")
    _shade_window(fig, measured, MEASURED_WASH, "measured", "top right")
    threshold = next((f.window_threshold_dbm for f in (measured, predicted) if f and f.window_threshold_dbm), None)
    if threshold is not None:
        fig.add_hline(y=threshold, line=dict(color="#666", dash="dash", width=1),
                      annotation_text=f"window threshold {threshold:+.1f} dBm", annotation_position="bottom right")
    for finding, color in ((predicted, PREDICTED_COLOR), (measured, MEASURED_COLOR)):
        if finding is not None and finding.sweet_spot_v is not None:
            fig.add_vline(x=finding.sweet_spot_v, line=dict(color=color, width=1))
    fig.update_layout(template="plotly_white", height=520, margin=dict(l=70, r=30, t=60, b=50),
                      title=f"IIP3 against gate voltage{_temp_label(temp_k)}",
                      legend=dict(orientation="h", y=-0.18, font=dict(size=11)))
    fig.update_xaxes(title_text="gate voltage (V)")
    fig.update_yaxes(title_text="IIP3 (dBm)")
    return fig


def what_if_figure(data: BiasPageData, sweep: DcSweep) -> go.Figure:
    """Predicted IIP3 against gate voltage with each source degeneration impedance of the page."""
    result = sweep.derivatives()
    fig = go.Figure(go.Scatter(x=result.gate_v, y=capped_iip3_dbm(result, data.source_ohm), mode="lines",
                               name="no degeneration", line=dict(color=PREDICTED_COLOR)))
    for (label, z_ohm), color in zip(data.what_if_ohm, WHAT_IF_COLORS):
        what_if = degenerate(result, z_ohm, data.source_ohm)
        none = "none: the null is filled in" if complex(z_ohm).imag else "none in range"
        spots = ", ".join(f"{v:.4f} V" for v in what_if.sweet_spot_v[:3]) or none
        if len(what_if.sweet_spot_v) > 3:
            spots += f" and {len(what_if.sweet_spot_v) - 3} more"
        fig.add_trace(go.Scatter(x=result.gate_v, y=what_if.iip3_dbm, mode="lines", line=dict(color=color),
                                 name=f"{label} (sweet spot {spots})"))
    fig.update_layout(template="plotly_white", height=460, margin=dict(l=70, r=30, t=60, b=50),
                      title=f"Degeneration what-if, predicted from DC{_temp_label(sweep.temperature_k)}",
                      legend=dict(orientation="h", y=-0.2, font=dict(size=11)))
    fig.update_xaxes(title_text="gate voltage (V)")
    fig.update_yaxes(title_text="predicted IIP3 (dBm)")
    return fig


def temperature_figure(data: BiasPageData) -> go.Figure | None:
    """The sweet spot against temperature, predicted and measured, with their bounds."""
    fig = go.Figure()
    for kind, color, name in (("dc-prediction", PREDICTED_COLOR, "predicted (DC)"),
                              ("two-tone", MEASURED_COLOR, "measured (two-tone)")):
        found = sorted((f for f in data.findings if f.kind == kind and f.temperature_k is not None
                        and f.sweet_spot_v is not None), key=lambda f: f.temperature_k)
        if len(found) < 2:
            continue
        fig.add_trace(go.Scatter(x=[f.temperature_k for f in found], y=[f.sweet_spot_v for f in found],
                                 mode="lines+markers", name=name, line=dict(color=color),
                                 error_y=dict(type="data", array=[f.sweet_spot_bound_v or 0.0 for f in found])))
    if not fig.data:
        return None
    fig.update_layout(template="plotly_white", height=420, title="Sweet spot against temperature",
                      margin=dict(l=70, r=30, t=60, b=50))
    fig.update_xaxes(title_text="temperature (K)")
    fig.update_yaxes(title_text="sweet spot (V)")
    return fig


def _num(value: float | None, scale: float = 1.0, spec: str = ".4f", bound: float | None = None) -> str:
    if value is None:
        return "-"
    text = format(value * scale, spec)
    return text if bound is None else f"{text} ± {format(bound * scale, spec)}"


def side_by_side_table(data: BiasPageData, temp_k: float | None) -> str:
    """Predicted and measured in two columns, and their difference."""
    predicted = _finding(data, "dc-prediction", temp_k) or BiasFinding("dc-prediction")
    measured = _finding(data, "two-tone", temp_k) or BiasFinding("two-tone")

    def diff(a: float | None, b: float | None, scale: float, spec: str) -> str:
        return "-" if a is None or b is None else format((b - a) * scale, "+" + spec)

    rows = [
        ("sweet spot (V)", _num(predicted.sweet_spot_v, bound=predicted.sweet_spot_bound_v),
         _num(measured.sweet_spot_v, bound=measured.sweet_spot_bound_v),
         diff(predicted.sweet_spot_v, measured.sweet_spot_v, 1e3, ".1f") + " mV"),
        ("peak IIP3 (dBm)", _num(predicted.peak_iip3_dbm, spec=".2f"),
         _num(measured.peak_iip3_dbm, spec=".2f", bound=measured.peak_iip3_bound_db),
         diff(predicted.peak_iip3_dbm, measured.peak_iip3_dbm, 1.0, ".2f") + " dB"),
        ("window low (V)", _num(predicted.window_low_v, bound=predicted.window_low_bound_v),
         _num(measured.window_low_v, bound=measured.window_low_bound_v), "-"),
        ("window high (V)", _num(predicted.window_high_v, bound=predicted.window_high_bound_v),
         _num(measured.window_high_v, bound=measured.window_high_bound_v), "-"),
        ("window width (mV)", _num(predicted.window_width_v, 1e3, ".1f"), _num(measured.window_width_v, 1e3, ".1f"),
         diff(predicted.window_width_v, measured.window_width_v, 1e3, ".1f") + " mV"),
        ("drain current at the sweet spot (mA)", _num(predicted.drain_current_a, 1e3, ".3f"),
         _num(measured.drain_current_a, 1e3, ".3f"), "-"),
        ("gain at the sweet spot (dB)", _num(predicted.gain_db, spec=".2f"), _num(measured.gain_db, spec=".2f"), "-"),
        ("input offset, measured less predicted (dB)", "-", _num(measured.input_gain_offset_db, spec="+.2f"), "-"),
    ]
    body = "\n".join("<tr>" + f"<td>{html.escape(name)}</td>" + "".join(f'<td class="num">{html.escape(cell)}</td>'
                                                                        for cell in cells) + "</tr>"
                     for name, *cells in rows)
    return ("<table><tr><th></th><th>predicted from DC</th><th>measured two-tone</th>"
            f"<th>measured less predicted</th></tr>\n{body}\n</table>")


def _temperatures(data: BiasPageData) -> list[float | None]:
    temps = {s.temperature_k for s in data.dc_sweeps} | {m.temperature_k for m in data.measured} | \
            {f.temperature_k for f in data.findings}
    return sorted(temps, key=lambda t: (t is not None, t or 0.0))


def render_bias_page(data: BiasPageData) -> str:
    """The whole page as one string."""
    sections = []
    for index, temp_k in enumerate(_temperatures(data)):
        label = _temp_label(temp_k)
        sweeps = [s for s in data.dc_sweeps if s.temperature_k == temp_k]
        predicted = _finding(data, "dc-prediction", temp_k)
        for sweep in sweeps:
            zero_v = None if predicted is None else predicted.sweet_spot_v
            sections.append((f"Drain current and g1, g2, g3{label}", _figure_html(dc_figure(sweep, zero_v), f"dc-{index}")))
        sections.append((f"IIP3 against gate voltage{label}",
                         _figure_html(iip3_figure(data, temp_k), f"iip3-{index}") + side_by_side_table(data, temp_k)))
        if sweeps and data.what_if_ohm:
            sections.append((f"Degeneration what-if{label}", _figure_html(what_if_figure(data, sweeps[0]),
                                                                           f"what-if-{index}")))
    by_temp = temperature_figure(data)
    if by_temp is not None:
        sections.append(("Sweet spot against temperature", _figure_html(by_temp, "by-temperature")))
    summary = "\n".join(f"<dt>{html.escape(k)}</dt><dd>{html.escape(v)}</dd>" for k, v in data.summary.items())
    body = "\n".join(f"<h2>{html.escape(title)}</h2>\n{content}" for title, content in sections)
    return page_html(data.title, f"""<header>
<h1>{html.escape(data.title)}</h1>
<dl class="summary">
{summary}
</dl>
</header>
{body}""")
