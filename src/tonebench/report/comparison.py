"""Comparison report across devices: one self-contained HTML page built from a result query.

Plots IIP3 and OIP3 against center frequency, tone spacing and bias (one style per device, the
same in every panel), the IIP3 distribution per lot with the spec limits (box plot and empirical
CDF), wafer maps from the die positions, and lower against upper IM3 intercepts. By default a
device measured several times shows its latest run (the query decides which runs are eligible). Results
flagged as limited by the test system are drawn apart (grey, their own trace) and listed in their
own table. Page shell, stylesheet and the file write are report/html.py's.
"""

from __future__ import annotations

import html
import statistics
from collections import Counter, defaultdict
from pathlib import Path

import plotly.graph_objects as go
import plotly.io as pio
from plotly.subplots import make_subplots
from sqlalchemy.orm import Session

from tonebench.catalog.limits import LimitRule, list_limits
from tonebench.catalog.query import ResultFilter, ResultRow, find_results, latest_per_device
from tonebench.catalog.sweet_spots import find_sweet_spots
from tonebench.errors import InputError
from tonebench.report.html import check_report_path, page_html, write_html_file
from tonebench.report.lot_plots import LIMIT_COLOR, ecdf_figure, wafer_maps
from tonebench.report.sweet_spot_plots import latest_per_device as spot_latest
from tonebench.report.sweet_spot_plots import sweet_spot_figure
from tonebench.units import format_freq

MAX_DEVICE_TRACES = 60  # above this many devices, traces are per lot (a legend of hundreds helps no one)
FLAGGED_COLOR = "#9a9a9a"
# Ten distinguishable hues (our own order); past ten devices the marker shape changes too, so no
# two series share a style (10 hues x 6 shapes covers MAX_DEVICE_TRACES).
SERIES_COLORS = ("#1f5fa8", "#c0561b", "#2a8a4a", "#7a4f9a", "#8a6d1f", "#b03a6a", "#3b8f9e", "#5c5c5c",
                 "#a0522d", "#4a6fd0")
SERIES_SYMBOLS = ("circle", "square", "diamond", "triangle-up", "triangle-down", "star")

def _device_label(row: ResultRow) -> str:
    return f"{row.part_number} {row.serial}"


Style = tuple[str, str]  # (colour, marker symbol)


def series_styles(rows: list[ResultRow]) -> dict[str, Style]:
    """One style per series (device, or lot when there are too many devices) for the whole page,
    so a device looks the same in every panel, and no two series look alike."""
    _kind, series = _series(rows)
    return {label: (SERIES_COLORS[i % len(SERIES_COLORS)], SERIES_SYMBOLS[(i // len(SERIES_COLORS)) % len(SERIES_SYMBOLS)])
            for i, label in enumerate(sorted(series))}


def _series(rows: list[ResultRow]) -> tuple[str, dict[str, list[ResultRow]]]:
    """Rows grouped per device, or per lot when there are too many devices to tell apart."""
    by_device: dict[str, list[ResultRow]] = defaultdict(list)
    for row in rows:
        by_device[_device_label(row)].append(row)
    if len(by_device) <= MAX_DEVICE_TRACES:
        return "device", dict(by_device)
    by_lot: dict[str, list[ResultRow]] = defaultdict(list)
    for row in rows:
        by_lot[f"lot {row.lot or '(none)'}"].append(row)
    return "lot", dict(by_lot)


def _hover(row: ResultRow) -> str:
    bias = "" if row.bias_v is None else f", bias {row.bias_v:g} V"
    flags = f"<br>flags: {', '.join(row.flags)}" if row.flags else ""
    return (f"{html.escape(_device_label(row))} (lot {html.escape(row.lot or '-')})<br>"
            f"{format_freq(row.center_hz, 3)}, spacing {format_freq(row.spacing_hz)}{bias}<br>"
            f"run {row.run_guid[:8]}, verdict {row.verdict or '-'}{flags}")


def _against(rows: list[ResultRow], x_name: str, x_scale: float, x_title: str, title: str,
             log_x: bool = False, styles: dict[str, Style] | None = None) -> go.Figure:
    """IIP3 (left) and OIP3 (right) against one condition; flagged results in their own trace."""
    fig = make_subplots(rows=1, cols=2, subplot_titles=("IIP3", "OIP3"), horizontal_spacing=0.08)
    clean = [r for r in rows if not r.flags]
    flagged = [r for r in rows if r.flags]
    kind, series = _series(clean)
    if styles is None or any(label not in styles for label in series):  # a subset drawn per device
        styles = series_styles(clean)
    for label, members in sorted(series.items()):
        color, symbol = styles[label]  # the device's style in every panel
        members = sorted(members, key=lambda r: (getattr(r, x_name), r.spacing_hz, r.bias_v or 0.0))
        xs = [getattr(r, x_name) / x_scale for r in members]
        mode = "lines+markers" if len(set(xs)) == len(xs) and kind == "device" else "markers"
        for col, value in ((1, "iip3_dbm"), (2, "oip3_dbm")):
            fig.add_trace(go.Scatter(
                x=xs, y=[getattr(r, value) for r in members], mode=mode, name=html.escape(label), legendgroup=label,
                showlegend=col == 1, hovertext=[_hover(r) for r in members], line={"color": color},
                marker={"color": color, "symbol": symbol, "size": 7},
                hovertemplate="%{y:.2f} dBm<br>%{hovertext}<extra></extra>"), row=1, col=col)
    if flagged:
        for col, value in ((1, "iip3_dbm"), (2, "oip3_dbm")):
            fig.add_trace(go.Scatter(
                x=[getattr(r, x_name) / x_scale for r in flagged], y=[getattr(r, value) for r in flagged],
                mode="markers", name="flagged (test-system limited)", legendgroup="flagged",
                showlegend=col == 1, marker=dict(color=FLAGGED_COLOR, symbol="x", size=9),
                hovertext=[_hover(r) for r in flagged],
                hovertemplate="%{y:.2f} dBm<br>%{hovertext}<extra>flagged</extra>"), row=1, col=col)
    suffix = " (one trace per lot: too many devices)" if kind == "lot" else ""
    fig.update_layout(title=title + suffix, template="plotly_white", height=460,
                      legend=dict(orientation="v", font=dict(size=10)))
    fig.update_xaxes(title_text=x_title, type="log" if log_x else None)
    fig.update_yaxes(title_text="IIP3 (dBm)", row=1, col=1)
    fig.update_yaxes(title_text="OIP3 (dBm)", row=1, col=2)
    return fig


def _limit_label(rule: LimitRule, part: str) -> str:
    bounds = " ".join(f"{name} {value:+.1f} dBm" for name, value in (("min", rule.min_value), ("max", rule.max_value))
                      if value is not None)
    return f"{html.escape(part)} IIP3 {bounds}, {rule.freq_min_hz / 1e9:.3f}-{rule.freq_max_hz / 1e9:.3f} GHz"


def _lot_key(row: ResultRow) -> str:
    """Part and lot as plain text (escape it where plotly shows it: plotly reads some HTML)."""
    return f"{row.part_number} lot {row.lot or '(none)'}"


def _lot_distribution(rows: list[ResultRow], limits: dict[str, list[LimitRule]]) -> go.Figure:
    """IIP3 of every result per part and lot (box and points), with that part's IIP3 spec limits
    as a dash across its boxes."""
    fig = go.Figure()
    by_lot: dict[str, list[ResultRow]] = defaultdict(list)
    for row in rows:
        by_lot[_lot_key(row)].append(row)
    for key, members in sorted(by_lot.items()):
        clean = [r for r in members if not r.flags]
        fig.add_trace(go.Box(
            x=[html.escape(key)] * len(clean), y=[r.iip3_dbm for r in clean], name=html.escape(key), boxpoints="all", jitter=0.4,
            pointpos=0, marker=dict(size=4), hovertext=[_hover(r) for r in clean], showlegend=False))
    flagged = [r for r in rows if r.flags]
    if flagged:
        fig.add_trace(go.Scatter(
            x=[html.escape(_lot_key(r)) for r in flagged], y=[r.iip3_dbm for r in flagged], mode="markers",
            name="flagged (test-system limited)", marker=dict(color=FLAGGED_COLOR, symbol="x", size=9),
            hovertext=[_hover(r) for r in flagged], hovertemplate="%{y:.2f} dBm<br>%{hovertext}<extra></extra>"))
    for part in sorted({r.part_number for r in rows}):
        keys = sorted(k for k in by_lot if k.startswith(f"{part} lot "))
        for rule in limits.get(part, []):
            if rule.parameter != "iip3_dbm":
                continue
            for value in (rule.min_value, rule.max_value):
                if value is not None:
                    fig.add_trace(go.Scatter(
                        x=[html.escape(k) for k in keys], y=[value] * len(keys), mode="lines+markers",
                        name=_limit_label(rule, part),
                        line=dict(color=LIMIT_COLOR, dash="dash", width=1.5),
                        marker=dict(symbol="line-ew-open", size=40, color=LIMIT_COLOR, line=dict(width=2)),
                        hoverinfo="name"))
    fig.update_layout(title="IIP3 per part and lot, with the IIP3 spec limits (all frequencies in the selection)",
                      template="plotly_white", height=480, xaxis_title="part and lot", yaxis_title="IIP3 (dBm)",
                      legend=dict(orientation="h", y=-0.3))
    return fig


def _asymmetry(rows: list[ResultRow]) -> go.Figure:
    """Upper against lower IM3 intercept; a symmetric device sits on the diagonal."""
    usable = [r for r in rows if r.iip3_lower_dbm is not None and r.iip3_upper_dbm is not None]
    fig = go.Figure()
    for name, members, marker in (
        ("results", [r for r in usable if not r.flags], dict(size=6, color="#1f5fa8")),
        ("flagged (test-system limited)", [r for r in usable if r.flags], dict(size=9, color=FLAGGED_COLOR, symbol="x")),
    ):
        if members:
            fig.add_trace(go.Scatter(
                x=[r.iip3_lower_dbm for r in members], y=[r.iip3_upper_dbm for r in members], mode="markers",
                name=name, marker=marker, hovertext=[_hover(r) for r in members],
                hovertemplate="lower %{x:.2f} dBm, upper %{y:.2f} dBm<br>%{hovertext}<extra></extra>"))
    if usable:
        values = [v for r in usable for v in (r.iip3_lower_dbm, r.iip3_upper_dbm)]
        low, high = min(values) - 1.0, max(values) + 1.0
        fig.add_trace(go.Scatter(x=[low, high], y=[low, high], mode="lines", name="lower = upper",
                                 line=dict(color="#444", dash="dot", width=1), hoverinfo="skip"))
    fig.update_layout(title="Lower against upper IM3 intercept (IIP3 from 2f1-f2 and from 2f2-f1)",
                      template="plotly_white", height=480, xaxis_title="IIP3 from the lower product (dBm)",
                      yaxis_title="IIP3 from the upper product (dBm)")
    return fig


def _fmt(value, spec: str = "+.2f") -> str:
    return "&ndash;" if value is None else format(value, spec)


def _table(head: list[str], body: list[list[str]], numeric: set[int]) -> str:
    """Cells must already be HTML-escaped."""
    header = "".join(f"<th>{h}</th>" for h in head)
    rows = "\n".join("<tr>" + "".join(f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>"
                                      for i, c in enumerate(cells)) + "</tr>" for cells in body)
    return f"<table>\n<thead><tr>{header}</tr></thead>\n<tbody>\n{rows}\n</tbody>\n</table>"


def _lot_table(rows: list[ResultRow]) -> str:
    by_lot: dict[str, list[ResultRow]] = defaultdict(list)
    for row in rows:
        by_lot[_lot_key(row)].append(row)
    body = []
    for lot, members in sorted(by_lot.items()):
        verdicts = Counter(r.verdict or "not judged" for r in members)
        iip3 = [r.iip3_dbm for r in members if r.iip3_dbm is not None and not r.flags]
        body.append([html.escape(lot), str(len({_device_label(r) for r in members})), str(len(members)),
                     str(verdicts["pass"]), str(verdicts["fail"]), str(verdicts["no-limit"]),
                     str(verdicts["not judged"]), str(sum(1 for r in members if r.flags)),
                     _fmt(statistics.median(iip3) if iip3 else None)])
    return _table(["part and lot", "devices", "results", "pass", "fail", "no limit", "not judged", "flagged",
                   "median IIP3, unflagged (dBm)"], body, set(range(1, 9)))


def _flagged_table(rows: list[ResultRow]) -> str:
    flagged = [r for r in rows if r.flags]
    if not flagged:
        return '<p class="note">No result in this selection is flagged.</p>'
    body = [[html.escape(_device_label(r)), html.escape(r.lot or "-"), r.run_guid[:8],
             format_freq(r.center_hz, 3), format_freq(r.spacing_hz), _fmt(r.bias_v, "g"),
             _fmt(r.iip3_dbm), _fmt(r.oip3_dbm), html.escape(", ".join(r.flags)), html.escape(r.verdict or "-")]
            for r in flagged]
    return _table(["device", "lot", "run", "center", "spacing", "bias (V)", "IIP3 (dBm)", "OIP3 (dBm)",
                   "flags", "verdict"], body, {5, 6, 7})


def _figure_html(fig: go.Figure, div_id: str) -> str:
    return ('<div class="figure">' + pio.to_html(fig, full_html=False, include_plotlyjs=False, div_id=div_id,
                                                 config={"displaylogo": False}) + "</div>")


def compare_figures(rows: list[ResultRow], limits: dict[str, list[LimitRule]],
                    sweet_spots: list[dict] = ()) -> dict[str, go.Figure]:
    """The page's figures by name (its div ids): by-frequency, by-spacing, by-bias (when some
    result has a bias), by-lot, ecdf, wafer-maps (when devices have die positions), asymmetry,
    sweet-spots (when the devices have stored sweet-spot findings). Results without a fitted IIP3
    are not plotted."""
    fitted = [r for r in rows if r.iip3_dbm is not None]
    styles = series_styles([r for r in fitted if not r.flags])
    figures = {
        "by-frequency": _against(fitted, "center_hz", 1e9, "center frequency (GHz)", "Intercepts against frequency",
                                 styles=styles),
        "by-spacing": _against(fitted, "spacing_hz", 1e6, "tone spacing (MHz)", "Intercepts against tone spacing",
                               log_x=True, styles=styles),
    }
    biased = [r for r in fitted if r.bias_v is not None]
    if biased:
        figures["by-bias"] = _against(biased, "bias_v", 1.0, "bias (V)", "Intercepts against bias", styles=styles)
    figures["by-lot"] = _lot_distribution(fitted, limits)
    figures["ecdf"] = ecdf_figure(fitted, limits, SERIES_COLORS)
    maps, _note = wafer_maps(fitted)
    if maps is not None:
        figures["wafer-maps"] = maps
    figures["asymmetry"] = _asymmetry(fitted)
    spots = sweet_spot_figure(list(sweet_spots), limits)
    if spots is not None:
        figures["sweet-spots"] = spots
    return figures


def render_compare_page(rows: list[ResultRow], limits: dict[str, list[LimitRule]], selection: str,
                        older_left_out: int = 0, sweet_spots: list[dict] = ()) -> str:
    """The whole page as one string; limits maps part number to its spec limits; older_left_out
    counts results of earlier runs not shown (one result per device and condition)."""
    if not rows:
        raise InputError(f"compare: the query ({selection}) matched no results; nothing to compare")
    fitted = [r for r in rows if r.iip3_dbm is not None]
    verdicts = Counter(r.verdict or "not judged" for r in rows)
    summary = {
        "Selection": selection,
        "Results": f"{len(rows)} ({len(rows) - len(fitted)} without a fitted IIP3, not plotted)",
        "Devices": str(len({_device_label(r) for r in rows})),
        "Lots": str(len({(r.part_number, r.lot) for r in rows})),
        "Verdicts": ", ".join(f"{k} {v}" for k, v in sorted(verdicts.items())),
        "Flagged": f"{sum(1 for r in rows if r.flags)} (grey crosses in the plots, listed at the end)",
        "Runs": ("the latest run of each device per condition" + (f" ({older_left_out} results of earlier runs left "
                 "out; --all-runs shows them)" if older_left_out else "")) if older_left_out >= 0 else "every run",
    }
    figures = compare_figures(rows, limits, sweet_spots)
    maps_note = wafer_maps(fitted)[1]

    def shown(name: str, absent: str = "") -> str:
        return _figure_html(figures[name], name) if name in figures else absent

    sections = [
        ("IIP3 and OIP3 against frequency", shown("by-frequency")),
        ("IIP3 and OIP3 against tone spacing", shown("by-spacing")),
        ("IIP3 and OIP3 against bias",
         shown("by-bias", '<p class="note">No result in this selection was measured with a bias.</p>')),
        ("IIP3 across parts and lots", shown("by-lot") + _lot_table(rows)),
        ("IIP3 distribution per lot", shown("ecdf")),
        ("Wafer maps", shown("wafer-maps")
         + (f'<p class="note">{html.escape(maps_note[0].upper() + maps_note[1:])}.</p>' if maps_note else "")),
        ("Lower against upper IM3", shown("asymmetry")),
        ("Sweet spot in gate bias per device",
         shown("sweet-spots", '<p class="note">No device in this selection has a stored sweet-spot study.</p>')),
        ("Flagged results (may be limited by the test system)", _flagged_table(rows)),
    ]
    summary_html = "\n".join(f"<dt>{html.escape(k)}</dt><dd>{html.escape(v)}</dd>" for k, v in summary.items())
    body = "\n".join(f"<h2>{html.escape(title)}</h2>\n{content}" for title, content in sections)
    return page_html("Device comparison", f"""<header>
<h1>Device comparison</h1>
<dl class="summary">
{summary_html}
</dl>
</header>
{body}""", body_class="wide")


def write_compare_report(session: Session, flt: ResultFilter, path: Path, limit: int | None = None,
                         all_runs: bool = False) -> tuple[Path, int]:
    """Query, render and write the page atomically; returns (path, number of results shown).
    Unless all_runs, a device measured more than once shows its latest run's results."""
    check_report_path(path, "compare report")  # before the query: a bad path costs nothing
    rows = find_results(session, flt, limit)
    older = -1
    if not all_runs:
        rows, older = latest_per_device(rows)
    limits = {part: [LimitRule.of(l) for l in list_limits(session, part)] for part in {r.part_number for r in rows}}
    spots = find_sweet_spots(session, flt)
    page = render_compare_page(rows, limits, flt.describe(), older, spots if all_runs else spot_latest(spots))
    return write_html_file(path, page, "compare report"), len(rows)
