"""The run report's summary figure: IIP3 and OIP3 of every sweep (lower, upper, and their mean
with its bound) against the condition the plan steps: frequency, else tone spacing, else gate
bias, else temperature, else LO power; one trace family per value of the other stepped conditions."""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass

import plotly.graph_objects as go
from plotly.subplots import make_subplots

# The conditions a sweep is stepped in, in the order the summary prefers them for its x axis:
# (field, axis title, scale from SI units, label of one value).
_CONDITIONS = (
    ("center_hz", "center frequency (GHz)", 1e-9, lambda v: f"{v / 1e9:.4g} GHz"),
    ("spacing_hz", "tone spacing (MHz)", 1e-6, lambda v: f"spacing {v / 1e6:.4g} MHz"),
    ("bias_v", "gate bias (V)", 1.0, lambda v: f"bias {v:.4f} V"),
    ("temperature_c", "temperature (degC)", 1.0, lambda v: f"{v:.1f} degC"),
    ("lo_dbm", "LO power (dBm)", 1.0, lambda v: f"LO {v:+.1f} dBm"),
)
_LOWER, _UPPER, _MEAN = "#c0561b", "#2a8a4a", "#1f5fa8"


@dataclass(frozen=True)
class SweepSummary:
    """One sweep's conditions and intercepts (dBm; None where not fitted)."""

    center_hz: float
    spacing_hz: float
    bias_v: float | None
    iip3_lower_dbm: float | None
    iip3_upper_dbm: float | None
    iip3_dbm: float | None
    oip3_lower_dbm: float | None
    oip3_upper_dbm: float | None
    oip3_dbm: float | None
    bound_db: float | None  # +/- on the mean intercepts
    temperature_c: float | None = None
    lo_dbm: float | None = None  # the stepped LO power of a mixer plan
    reported: str = "mean of lower and upper"  # what iip3_dbm and oip3_dbm are (the run's convention)


def _stepped(sweeps: list[SweepSummary]) -> list[tuple]:
    return [c for c in _CONDITIONS if len({getattr(s, c[0]) for s in sweeps}) > 1]


def summary_figure(sweeps: list[SweepSummary]) -> go.Figure | None:
    """IIP3 (left) and OIP3 (right) against the first stepped condition; None when nothing is
    stepped (a single sweep: its own figure says it all) or no sweep has an intercept."""
    fitted = [s for s in sweeps if s.iip3_dbm is not None]
    stepped = _stepped(fitted)
    if not stepped:
        return None
    field, title, scale, _ = stepped[0]
    others = stepped[1:]
    families: dict[str, list[SweepSummary]] = defaultdict(list)
    for sweep in fitted:
        families[", ".join(label(getattr(sweep, f)) for f, _, _, label in others)].append(sweep)
    fig = make_subplots(rows=1, cols=2, subplot_titles=("IIP3", "OIP3"), horizontal_spacing=0.09)
    dashes = ("solid", "dot", "dash", "dashdot", "longdash")
    for index, (family, members) in enumerate(sorted(families.items())):
        members.sort(key=lambda s: getattr(s, field))
        x = [getattr(s, field) * scale for s in members]
        suffix = f" ({family})" if family else ""
        for col, prefix in ((1, "iip3"), (2, "oip3")):
            # The mean first, so lower and upper (often equal to it) stay visible on top.
            fig.add_trace(go.Scatter(
                x=x, y=[getattr(s, f"{prefix}_dbm") for s in members], mode="lines+markers",
                name=f"{members[0].reported}, ± bound{suffix}", legendgroup=f"mean{suffix}", showlegend=col == 1,
                line={"color": _MEAN, "dash": dashes[index % len(dashes)]}, marker={"color": _MEAN, "size": 6},
                error_y={"type": "data", "array": [s.bound_db or 0.0 for s in members], "visible": True}),
                row=1, col=col)
            if family:  # each mean line named at its end: dashes alone do not tell families apart
                fig.add_annotation(x=x[-1], y=getattr(members[-1], f"{prefix}_dbm"), text=family, showarrow=False,
                                   xanchor="left", xshift=8, font={"size": 10, "color": _MEAN}, row=1, col=col)
            for kind, color, symbol in (("lower", _LOWER, "triangle-down"), ("upper", _UPPER, "triangle-up")):
                fig.add_trace(go.Scatter(
                    x=x, y=[getattr(s, f"{prefix}_{kind}_dbm") for s in members], mode="markers",
                    name=f"{kind}{suffix}", legendgroup=f"{kind}{suffix}", showlegend=col == 1,
                    marker={"color": color, "symbol": symbol, "size": 10}), row=1, col=col)
    fig.update_layout(template="plotly_white", height=440, title="Intercepts of every sweep",
                      legend={"orientation": "h", "y": -0.22, "font": {"size": 11}},
                      margin={"l": 70, "r": 30, "t": 70, "b": 60})
    values = [getattr(s, field) for s in fitted]
    # Spacings are stepped by decades (kHz to tens of MHz): a linear axis would crowd all but the widest.
    log_x = field == "spacing_hz" and min(values) > 0 and max(values) / min(values) >= 10.0
    fig.update_xaxes(title_text=title, type="log" if log_x else "linear")
    fig.update_yaxes(title_text="IIP3 (dBm)", row=1, col=1)
    fig.update_yaxes(title_text="OIP3 (dBm)", row=1, col=2)
    return fig
