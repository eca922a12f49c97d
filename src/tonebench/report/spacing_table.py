"""The run report's section on tone spacing: lower and upper IIP3 and the IM3 asymmetry (upper
minus lower, dB; analysis/asymmetry.py) against spacing, a table and a figure per group of the
other conditions; only when the plan steps the spacing. Read-only."""

from __future__ import annotations

import html
from collections import defaultdict

import plotly.graph_objects as go
import plotly.io as pio

from tonebench.analysis.asymmetry import im3_asymmetry_db
from tonebench.report.run_summary import SweepSummary
from tonebench.units import format_freq


def _group_label(s: SweepSummary) -> str:
    label = format_freq(s.center_hz, 3)
    if s.bias_v is not None:
        label += f", gate {s.bias_v:.4f} V"
    if s.temperature_c is not None:
        label += f", {s.temperature_c:.1f} degC"
    if s.lo_dbm is not None:
        label += f", LO {s.lo_dbm:+.2f} dBm"
    return label


def _cell(value: float | None, spec: str = "+.2f") -> str:
    return f"<td>{'-' if value is None else html.escape(format(value, spec))}</td>"


def _figure(groups: dict[str, list[SweepSummary]]) -> str:
    fig = go.Figure()
    shown_db = [0.0]
    for label, members in sorted(groups.items()):
        members = [s for s in members if im3_asymmetry_db(s.oip3_lower_dbm, s.oip3_upper_dbm) is not None]
        y = [im3_asymmetry_db(s.oip3_lower_dbm, s.oip3_upper_dbm) for s in members]
        shown_db += y
        fig.add_trace(go.Scatter(x=[s.spacing_hz for s in members], mode="lines+markers", name=label, y=y))
    # At least +/-0.5 dB (about an intercept's bound): a memoryless part's hundredths of a dB of
    # scatter must not fill the axis and read as memory.
    y_range = [min(-0.5, min(shown_db) - 0.1), max(0.5, max(shown_db) + 0.1)]
    fig.update_layout(template="plotly_white", height=380, title="IM3 asymmetry (upper minus lower) against spacing",
                      xaxis={"type": "log", "title": "tone spacing (Hz)"},
                      yaxis={"title": "upper - lower IM3 (dB)", "range": y_range, "zeroline": True})
    return ('<div class="figure">' + pio.to_html(fig, full_html=False, include_plotlyjs=False, div_id="spacing")
            + "</div>\n")


def spacing_section(summaries: list[SweepSummary]) -> str:
    """HTML: the section, or "" when the run has one spacing."""
    if len({s.spacing_hz for s in summaries}) < 2:
        return ""
    groups: dict[str, list[SweepSummary]] = defaultdict(list)
    for s in summaries:
        groups[_group_label(s)].append(s)
    body = []
    for label, members in sorted(groups.items()):
        for s in sorted(members, key=lambda s: s.spacing_hz):
            body.append(f"<tr><td>{html.escape(label)}</td><td>{html.escape(format_freq(s.spacing_hz))}</td>"
                        + _cell(s.iip3_lower_dbm) + _cell(s.iip3_upper_dbm)
                        + _cell(im3_asymmetry_db(s.oip3_lower_dbm, s.oip3_upper_dbm)) + "</tr>")
    head = "".join(f"<th>{h}</th>" for h in ("sweep", "spacing", "IIP3 lower (dBm)", "IIP3 upper (dBm)",
                                            "IM3 upper - lower (dB)"))
    note = ("Lower and upper IM3 that part with spacing are the sign of memory effects; the asymmetry is "
            "2 (OIP3 lower - OIP3 upper), the two products' difference at the same output tones.")
    return (f"<h2>IM3 against tone spacing</h2>\n<p>{html.escape(note)}</p>\n" + _figure(groups)
            + f'<table class="spacing">\n<thead><tr>{head}</tr></thead>\n<tbody>\n' + "\n".join(body)
            + "\n</tbody>\n</table>\n")
