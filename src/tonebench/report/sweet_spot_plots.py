"""The sweet spot and its window per device of a lot, for the comparison report: one point per
device and finding (predicted from DC, measured two-tone), its bound as an error bar and its
window as a translucent bar, per chamber temperature; a measured spot's verdict on its outline
and the part's sweet-spot limits as dashed lines."""

from __future__ import annotations

import html

import plotly.graph_objects as go

from tonebench.catalog.limits import LimitRule
from tonebench.report.lot_plots import LIMIT_COLOR, VERDICT_OUTLINES

KIND_STYLES = {"dc-prediction": ("predicted from DC", "diamond-open", -0.12),
               "two-tone": ("measured two-tone", "circle", 0.12)}  # (label, symbol, x offset)
TEMPERATURE_COLORS = ("#1f5fa8", "#c0561b", "#2a8a4a", "#7a4f9a", "#8a6d1f", "#b03a6a")


def latest_per_device(spots: list[dict]) -> list[dict]:
    """One finding per device, kind and temperature: the newest study's (the query's order)."""
    seen, kept = set(), []
    for spot in spots:  # newest study first
        key = (spot["part_number"], spot["serial"], spot["kind"], spot["temperature_c"])
        if key not in seen:
            seen.add(key)
            kept.append(spot)
    return kept


def sweet_spot_figure(spots: list[dict], limits: dict[str, list[LimitRule]] | None = None) -> go.Figure | None:
    """Gate voltage of the sweet spot per device (x: part, lot and serial), or None without findings."""
    if not spots:
        return None
    devices = sorted({(s["part_number"], s["lot"] or "-", s["serial"]) for s in spots})
    x_of = {device: index for index, device in enumerate(devices)}
    temperatures = sorted({s["temperature_c"] for s in spots}, key=lambda t: (t is None, t))
    fig = go.Figure()
    for t_index, temperature_c in enumerate(temperatures):
        color = TEMPERATURE_COLORS[t_index % len(TEMPERATURE_COLORS)]
        at = "" if temperature_c is None else f", {temperature_c:g} degC"
        for kind, (label, symbol, offset) in KIND_STYLES.items():
            members = [s for s in spots if s["kind"] == kind and s["temperature_c"] == temperature_c]
            if not members:
                continue
            xs = [x_of[(s["part_number"], s["lot"] or "-", s["serial"])] + offset for s in members]
            windows = [(s["window_low_v"], s["window_high_v"]) for s in members]
            fig.add_trace(go.Bar(
                x=xs, y=[high - low if low is not None and high is not None else None for low, high in windows],
                base=[low for low, _high in windows], width=0.18, marker=dict(color=color, opacity=0.18),
                name=f"window, {label}{at}", legendgroup=f"{kind}{at}", showlegend=False, hoverinfo="skip"))
            fig.add_trace(go.Scatter(
                x=xs, y=[s["sweet_spot_v"] for s in members], mode="markers", name=f"sweet spot, {label}{at}",
                legendgroup=f"{kind}{at}", marker=dict(symbol=symbol, size=10, color=color, line=dict(
                    width=[3 if s["verdict"] in VERDICT_OUTLINES else 1.5 for s in members],
                    color=[VERDICT_OUTLINES.get(s["verdict"], color) for s in members])),
                error_y=dict(type="data", array=[s["sweet_spot_bound_v"] for s in members], color=color),
                hovertext=[_hover(s) for s in members], hovertemplate="%{hovertext}<extra></extra>"))
    _limit_lines(fig, limits or {}, {part for part, _lot, _serial in devices})
    judged = any(s["verdict"] in VERDICT_OUTLINES for s in spots)
    fig.update_layout(
        title="Sweet spot (gate voltage where g3 crosses zero), its bound, and its window (bar) per device"
              + ("<br><sup>outline of a measured spot: its spec verdict, green pass, red fail</sup>" if judged else ""),
        template="plotly_white", height=480, barmode="overlay", yaxis_title="gate voltage (V)",
        xaxis=dict(tickmode="array", tickvals=list(range(len(devices))), title="device (serial, lot)",
                   ticktext=[f"{html.escape(serial)}<br>{html.escape(lot)}" for _part, lot, serial in devices]),
        legend=dict(font=dict(size=10)))
    return fig


def _limit_lines(fig: go.Figure, limits: dict[str, list[LimitRule]], parts: set[str]) -> None:
    """The sweet-spot limits of the parts shown (a single part's, in a lot comparison)."""
    for part in sorted(parts):
        for rule in limits.get(part, []):
            if rule.parameter != "sweet_spot_v":
                continue
            for name, value in (("min", rule.min_value), ("max", rule.max_value)):
                if value is not None:
                    label = f"{html.escape(part)} spec {name} {value:.4f} V" if len(parts) > 1 else f"spec {name} {value:.4f} V"
                    fig.add_hline(y=value, line=dict(color=LIMIT_COLOR, dash="dash", width=1.5),
                                  annotation_text=label, annotation_font_color=LIMIT_COLOR)


def _hover(spot: dict) -> str:
    window = ("" if spot["window_low_v"] is None else
              f"<br>window {spot['window_low_v']:.4f} to {spot['window_high_v']:.4f} V")
    return (f"{html.escape(spot['serial'])}: {spot['sweet_spot_v']:.4f} ± {spot['sweet_spot_bound_v'] * 1e3:.1f} mV"
            f"{window}<br>peak IIP3 {spot['peak_iip3_dbm']:+.2f} dBm, {html.escape(spot['kind'])}"
            + ("" if spot["verdict"] is None else f"<br>{html.escape(spot['verdict'])}: {html.escape(spot['verdict_detail'] or '')}"))
