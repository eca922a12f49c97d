"""Lot views of a comparison: the IIP3 distribution per part and lot as an empirical CDF with the
part's spec limits, and wafer maps from the registry's die positions, coloured by IIP3 with the
verdict on each die's outline."""

from __future__ import annotations

import html
import re
from collections import defaultdict

import numpy as np
import plotly.graph_objects as go
from plotly.subplots import make_subplots

from tonebench.catalog.limits import LimitRule
from tonebench.catalog.query import ResultRow

LIMIT_COLOR = "#b22222"
# The verdict on a die's outline: pass and fail stand out, the rest stays quiet.
VERDICT_OUTLINES = {"pass": "#2a8a4a", "fail": "#d01c1c"}
MAX_WAFERS = 12  # wafer maps drawn; more are counted in the note
# Die positions the registry may hold: "R12C7" (row, column), "X3Y-4", or "3,-4" (x, y).
_POSITION_FORMS = (
    (re.compile(r"^\s*[Rr](-?\d+)\s*[Cc](-?\d+)\s*$"), lambda a, b: (int(b), int(a))),
    (re.compile(r"^\s*[Xx](-?\d+)\s*[Yy](-?\d+)\s*$"), lambda a, b: (int(a), int(b))),
    (re.compile(r"^\s*(-?\d+)\s*[,;/ ]\s*(-?\d+)\s*$"), lambda a, b: (int(a), int(b))),
)
POSITION_FORMS_TEXT = '"R12C7" (row, column), "X3Y-4" or "3,-4" (x, y)'


def die_xy(position: str | None) -> tuple[int, int] | None:
    """A die position as (x, y) on the map, or None when it is in none of the known forms."""
    for pattern, to_xy in _POSITION_FORMS:
        match = pattern.match(position or "")
        if match:
            return to_xy(*match.groups())
    return None


def _lot_key(row: ResultRow) -> str:
    return f"{row.part_number} lot {row.lot or '(none)'}"


def ecdf_figure(rows: list[ResultRow], limits: dict[str, list[LimitRule]], colors: tuple[str, ...]) -> go.Figure:
    """Per part (one panel each), the fraction of unflagged results with IIP3 at or below x, one
    step line per lot; the part's IIP3 spec limits as dashed vertical lines."""
    parts = sorted({r.part_number for r in rows})
    fig = make_subplots(rows=len(parts), cols=1, subplot_titles=[html.escape(p) for p in parts],
                        vertical_spacing=0.12 if len(parts) > 1 else 0.0)
    for index, part in enumerate(parts, start=1):
        by_lot: dict[str, list[float]] = defaultdict(list)
        for r in rows:
            if r.part_number == part and not r.flags and r.iip3_dbm is not None:
                by_lot[_lot_key(r)].append(r.iip3_dbm)
        for lot_index, (key, values) in enumerate(sorted(by_lot.items())):
            xs = np.sort(values)
            fraction = np.arange(1, xs.size + 1) / xs.size
            fig.add_trace(go.Scatter(x=xs, y=fraction, mode="lines+markers", line=dict(shape="hv",
                          color=colors[lot_index % len(colors)]), marker=dict(size=5), name=html.escape(key),
                          hovertemplate="IIP3 %{x:.2f} dBm: %{y:.0%} of the lot at or below<extra>" + html.escape(key)
                                        + "</extra>"), row=index, col=1)
        for rule in limits.get(part, []):
            if rule.parameter != "iip3_dbm":
                continue
            for name, value in (("min", rule.min_value), ("max", rule.max_value)):
                if value is not None:
                    fig.add_vline(x=value, line=dict(color=LIMIT_COLOR, dash="dash", width=1.5), row=index, col=1,
                                  annotation_text=f"spec {name} {value:+.1f} dBm", annotation_font_color=LIMIT_COLOR)
        fig.update_yaxes(title_text="fraction at or below", range=[0, 1.02], tickformat=".0%", row=index, col=1)
        fig.update_xaxes(title_text="IIP3 (dBm)", row=index, col=1)
    fig.update_layout(title="IIP3 distribution per part and lot (empirical CDF, unflagged results)",
                      template="plotly_white", height=380 * len(parts) + 80)
    return fig


def wafer_maps(rows: list[ResultRow]) -> tuple[go.Figure | None, str]:
    """One map per part, lot and wafer: each die at its position, coloured by its median IIP3
    over the selection, outlined by its verdict (fail if any result failed). Returns the figure
    (None without positions) and a note on what could not be drawn."""
    by_wafer: dict[tuple[str, str, str], dict[tuple[int, int], list[ResultRow]]] = defaultdict(lambda: defaultdict(list))
    unplaced = set()
    for r in rows:
        xy = die_xy(r.position)
        if xy is None or r.iip3_dbm is None or r.flags:
            if xy is None:
                unplaced.add((r.part_number, r.serial))
            continue
        by_wafer[(r.part_number, r.lot or "(none)", r.wafer or "(none)")][xy].append(r)
    notes = []
    if unplaced:
        notes.append(f"{len(unplaced)} device(s) without a die position in a known form ({POSITION_FORMS_TEXT}) "
                     "are not on a map")
    if not by_wafer:
        return None, "; ".join(notes) or "no die positions in this selection"
    wafers = sorted(by_wafer)[:MAX_WAFERS]
    if len(by_wafer) > MAX_WAFERS:
        notes.append(f"the first {MAX_WAFERS} of {len(by_wafer)} wafers are drawn")
    values = [np.median([r.iip3_dbm for r in dies]) for w in wafers for dies in by_wafer[w].values()]
    low, high = float(min(values)), float(max(values))
    columns = min(3, len(wafers))
    fig = make_subplots(rows=-(-len(wafers) // columns), cols=columns,
                        subplot_titles=[html.escape(f"{part} lot {lot} wafer {wafer}") for part, lot, wafer in wafers])
    for index, key in enumerate(wafers):
        dies = by_wafer[key]
        xs, ys = zip(*dies)
        medians = [float(np.median([r.iip3_dbm for r in members])) for members in dies.values()]
        verdicts = ["fail" if any(r.verdict == "fail" for r in members) else
                    "pass" if all(r.verdict == "pass" for r in members) else "other" for members in dies.values()]
        hover = [f"{html.escape(members[0].serial)} at {html.escape(members[0].position or '')}: IIP3 {m:+.2f} dBm "
                 f"(median of {len(members)}), {v}" for members, m, v in zip(dies.values(), medians, verdicts)]
        fig.add_trace(go.Scatter(
            x=xs, y=ys, mode="markers", showlegend=False, hovertext=hover, hovertemplate="%{hovertext}<extra></extra>",
            marker=dict(symbol="square", size=18, color=medians, cmin=low, cmax=high, colorscale="Viridis",
                        showscale=index == 0, colorbar=dict(title="IIP3 (dBm)"),
                        line=dict(width=3, color=[VERDICT_OUTLINES.get(v, "rgba(0,0,0,0)") for v in verdicts]))),
            row=index // columns + 1, col=index % columns + 1)
    # Every map on the same grid, so that die positions compare across wafers; y (the row) grows
    # downwards, as the rows of a die map are counted.
    all_xy = [xy for w in wafers for xy in by_wafer[w]]
    (x_low, y_low), (x_high, y_high) = np.min(all_xy, axis=0), np.max(all_xy, axis=0)
    fig.update_xaxes(showgrid=False, zeroline=False, range=[x_low - 1, x_high + 1], title_text="column (x)")
    fig.update_yaxes(showgrid=False, zeroline=False, range=[y_high + 1, y_low - 1], title_text="row (y)")
    fig.update_layout(title="Wafer maps: median IIP3 per die; outline green = pass, red = fail",
                      template="plotly_white", height=360 * (-(-len(wafers) // columns)) + 80)
    return fig, "; ".join(notes)
