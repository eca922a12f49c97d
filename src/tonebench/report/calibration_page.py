"""A calibration set as a self-contained HTML page: offsets against frequency (plotly.js embedded,
works offline), its provenance and its system residual."""

from __future__ import annotations

import html
from pathlib import Path

import plotly.graph_objects as go
import plotly.io as pio

from tonebench.calibration.sets import CalibrationView
from tonebench.report.html import check_report_path, page_html, write_html_file

PATH_LABELS = {"in1": "in1 (source 1 to DUT input)", "in2": "in2 (source 2 to DUT input)", "out": "out (DUT output to analyzer)"}


def _fmt(value, spec: str = "+.2f") -> str:
    return "-" if value is None else format(value, spec)


def _table(header: list[str], rows: list[list[str]]) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in row) + "</tr>" for row in rows)
    thead = f"<thead><tr>{head}</tr></thead>" if any(header) else ""
    return f"<table>{thead}<tbody>{body}</tbody></table>"


def offsets_figure(view: CalibrationView) -> go.Figure:
    figure = go.Figure()
    for path, table in view.tables.items():
        figure.add_trace(go.Scatter(
            x=table.freqs_hz / 1e9, y=table.losses_db, mode="lines+markers", name=PATH_LABELS[path],
            hovertemplate="%{x:.6f} GHz<br>%{y:.3f} dB<extra>" + path + "</extra>",
        ))
    figure.update_layout(
        title=f"Path losses of {view.name} (linear in dB between points, never extrapolated)",
        xaxis_title="Frequency (GHz)", yaxis_title="Loss (dB)", template="plotly_white", height=480,
    )
    return figure


def write_calibration_page(view: CalibrationView, path: Path) -> Path:
    """Write the page (write_html_file: checked, temporary file, fsync, rename); returns the path."""
    check_report_path(path, "calibration page")
    provenance = [
        ["Name", view.name], ["Method", view.method],
        ["Created (UTC)", f"{view.created_at:%Y-%m-%d %H:%M:%S}"], ["Operator", view.operator or "-"],
        ["Valid for", f"{view.valid_days:g} days"], ["Status", view.status()],
        ["Range", f"{view.freq_min_hz / 1e9:.6f} to {view.freq_max_hz / 1e9:.6f} GHz"],
        ["Notes", view.notes or "-"],
    ]
    instruments = [[i.get("step", ""), i.get("role", ""), i.get("resource", ""), i.get("idn", "")] for i in view.instruments]
    files = [[f.get("offset_path", "plan"), f.get("file", f.get("plan", "")), f.get("sha256", "")]
             for f in view.source_files]
    residuals = [
        [f"{r['center_hz'] / 1e9:.6f}", f"{r['spacing_hz'] / 1e6:.6g}", f"{r['atten_db']:g}", _fmt(r["system_ip3_dbm"]),
         _fmt(r["source_ip3_dbm"]), _fmt(r["analyzer_ip3_dbm"])]
        for r in view.residuals
    ]
    figure_html = pio.to_html(offsets_figure(view), full_html=False, include_plotlyjs=False, div_id="offsets",
                              config={"displaylogo": False})
    parts = [
        f"<h1>Calibration set {html.escape(view.name)}</h1>",
        _table(["", ""], provenance),
        f'<div class="figure">{figure_html}</div>',
    ]
    if instruments:
        parts += ["<h2>Instruments</h2>", _table(["Step", "Role", "Resource", "*IDN?"], instruments)]
    if files:
        parts += ["<h2>Files</h2>", _table(["Path", "File", "SHA-256"], files)]
    if residuals:
        parts += [
            "<h2>System residual (intercepts at the DUT input plane, dBm)</h2>",
            _table(["Center (GHz)", "Spacing (MHz)", "Atten (dB)", "System", "Sources", "Analyzer"], residuals),
        ]
    page = page_html(f"Calibration set {view.name}", "\n".join(parts))
    return write_html_file(path, page, "calibration page")
