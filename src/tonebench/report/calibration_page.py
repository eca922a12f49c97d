"""A calibration set as a self-contained HTML page (plotly.js embedded, works offline): each
path's loss against frequency on its own axis, its provenance, and its system residual with the
thru sweeps against tone level."""

from __future__ import annotations

import html
from pathlib import Path

import numpy as np
import plotly.graph_objects as go
import plotly.io as pio
from plotly.subplots import make_subplots

from tonebench.calibration.sets import CalibrationView
from tonebench.report.html import check_report_path, page_html, write_html_file
from tonebench.units import format_freq

PATH_LABELS = {"in1": "in1 (source 1 to DUT input)", "in2": "in2 (source 2 to DUT input)", "out": "out (DUT output to analyzer)"}


def _fmt(value, spec: str = "+.2f") -> str:
    return "-" if value is None else format(value, spec)


def _table(header: list[str], rows: list[list[str]]) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in row) + "</tr>" for row in rows)
    thead = f"<thead><tr>{head}</tr></thead>" if any(header) else ""
    return f"<table>{thead}<tbody>{body}</tbody></table>"


# A step more than this many times the median step is a gap in the measurement: no line across it.
GAP_FACTOR = 3.0
PRODUCT_STYLES = {"im3_lower_dbm": ("IM3 lower (2f1-f2)", "triangle-down", "#c0561b"),
                  "im3_upper_dbm": ("IM3 upper (2f2-f1)", "triangle-up", "#1f5fa8")}


def with_gaps(freqs_hz: np.ndarray, values: np.ndarray) -> tuple[list, list]:
    """The points with a None between two that are far apart, so no line is drawn across a gap."""
    steps = np.diff(freqs_hz)
    limit = GAP_FACTOR * float(np.median(steps)) if steps.size else np.inf
    xs: list = []
    ys: list = []
    for index, (freq_hz, value) in enumerate(zip(freqs_hz, values)):
        if index and steps[index - 1] > limit:
            xs.append(None)
            ys.append(None)
        xs.append(float(freq_hz) / 1e9)
        ys.append(float(value))
    return xs, ys


def offsets_figure(view: CalibrationView) -> go.Figure:
    """One panel per path, each on its own loss axis (so 0.05 dB of ripple shows), sharing the
    frequency axis; a marker at every measured frequency, lines only between neighbours."""
    paths = list(view.tables)
    figure = make_subplots(rows=len(paths), cols=1, shared_xaxes=True, vertical_spacing=0.06,
                           subplot_titles=[PATH_LABELS[p] for p in paths])
    for row, path in enumerate(paths, start=1):
        table = view.tables[path]
        xs, ys = with_gaps(table.freqs_hz, table.losses_db)
        figure.add_trace(go.Scatter(
            x=xs, y=ys, mode="lines+markers", name=PATH_LABELS[path], showlegend=False, connectgaps=False,
            marker=dict(size=5), hovertemplate="%{x:.6f} GHz<br>%{y:.3f} dB<extra>" + path + "</extra>"),
            row=row, col=1)
        figure.update_yaxes(title_text="loss (dB)", row=row, col=1)
    figure.update_xaxes(title_text="frequency (GHz)", row=len(paths), col=1)
    figure.update_layout(
        title=f"Path losses of {view.name} (linear in dB between points, never extrapolated)",
        template="plotly_white", height=260 * len(paths) + 120,
    )
    return figure


def residual_figure(residual: dict) -> go.Figure | None:
    """The thru sweep of one (center, spacing): both IM3 products and their noise floor against
    tone level at the DUT input plane, one panel per analyzer attenuation."""
    sweeps = (residual.get("sweep") or {}).get("sweeps") or []
    if not sweeps:
        return None
    figure = make_subplots(rows=1, cols=len(sweeps), shared_yaxes=True,
                           subplot_titles=[f"attenuation {s['atten_db']:g} dB" for s in sweeps])
    for col, sweep in enumerate(sweeps, start=1):
        tone_dbm = [(a + b) / 2 if a is not None and b is not None else None
                    for a, b in zip(sweep["p1_dbm"], sweep["p2_dbm"])]
        for name, (label, symbol, color) in PRODUCT_STYLES.items():
            figure.add_trace(go.Scatter(x=tone_dbm, y=sweep[name], mode="lines+markers", name=label, legendgroup=name,
                                        showlegend=col == 1, marker=dict(symbol=symbol, size=8, color=color),
                                        line=dict(color=color)), row=1, col=col)
            noise = sweep[name.replace("im3", "noise")]
            figure.add_trace(go.Scatter(x=tone_dbm, y=noise, mode="lines", name=f"{label} noise", legendgroup=name,
                                        showlegend=col == 1, line=dict(color=color, dash="dot", width=1)), row=1, col=col)
        figure.update_xaxes(title_text="tone level at the DUT input (dBm)", row=1, col=col)
    figure.update_yaxes(title_text="at the DUT output plane (dBm)", row=1, col=1)
    figure.update_layout(title=f"System residual through a thru, {format_freq(residual['center_hz'])}, spacing "
                               f"{format_freq(residual['spacing_hz'])}", template="plotly_white", height=420)
    return figure


def _figure_html(figure: go.Figure, div_id: str) -> str:
    return ('<div class="figure">' + pio.to_html(figure, full_html=False, include_plotlyjs=False, div_id=div_id,
                                                 config={"displaylogo": False}) + "</div>")


def write_calibration_page(view: CalibrationView, path: Path) -> Path:
    """Write the page (write_html_file: checked, temporary file, fsync, rename); returns the path."""
    check_report_path(path, "calibration page")
    provenance = [
        ["Name", view.name], ["Method", view.method],
        ["Created (UTC)", f"{view.created_at:%Y-%m-%d %H:%M:%S}"], ["Operator", view.operator or "-"],
        ["Valid for", f"{view.valid_days:g} days"], ["Status", view.status()],
        ["Range", f"{format_freq(view.freq_min_hz)} to {format_freq(view.freq_max_hz)}"],
        ["Notes", view.notes or "-"],
    ]
    instruments = [[i.get("step", ""), i.get("role", ""), i.get("resource", ""), i.get("idn", "")] for i in view.instruments]
    files = [[f.get("offset_path", "plan"), f.get("file", f.get("plan", "")), f.get("sha256", "")]
             for f in view.source_files]
    residuals = [
        [format_freq(r["center_hz"]), format_freq(r["spacing_hz"]), f"{r['atten_db']:g}", _fmt(r["system_ip3_dbm"]),
         _fmt(r["source_ip3_dbm"]), _fmt(r["analyzer_ip3_dbm"])]
        for r in view.residuals
    ]
    parts = [
        f"<h1>Calibration set {html.escape(view.name)}</h1>",
        _table(["", ""], provenance),
        _figure_html(offsets_figure(view), "offsets"),
    ]
    if instruments:
        parts += ["<h2>Instruments</h2>", _table(["Step", "Role", "Resource", "*IDN?"], instruments)]
    if files:
        parts += ["<h2>Files</h2>", _table(["Path", "File", "SHA-256"], files)]
    if residuals:
        parts += [
            "<h2>System residual (intercepts at the DUT input plane, dBm)</h2>",
            _table(["Center", "Spacing", "Atten (dB)", "System", "Sources", "Analyzer"], residuals),
        ]
        for index, residual in enumerate(view.residuals):
            figure = residual_figure(residual)
            if figure is not None:
                parts.append(_figure_html(figure, f"residual-{index}"))
    page = page_html(f"Calibration set {view.name}", "\n".join(parts))
    return write_html_file(path, page, "calibration page")
