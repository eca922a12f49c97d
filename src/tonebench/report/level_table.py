"""The run report's table of results per drive level (store/models/levels.py) and the line saying
which intercept the results report; read-only."""

from __future__ import annotations

import html

from sqlalchemy import select
from sqlalchemy.orm import Session

from tonebench.store.models import LevelResult, Result, Run
from tonebench.units import format_freq

_COLUMNS = (  # (heading, LevelResult field)
    ("tone (dBm)", "tone_dbm"),
    ("IM3 lower re f1 (dBc)", "im3_lower_dbc"), ("IM3 upper re f2 (dBc)", "im3_upper_dbc"),
    ("IM3 lower re PEP (dBc)", "im3_lower_dbc_pep"), ("IM3 upper re PEP (dBc)", "im3_upper_dbc_pep"),
    ("IM3 +/- (dB)", "im3_bound_db"),
    ("IIP3 lower (dBm)", "iip3_lower_dbm"), ("IIP3 upper (dBm)", "iip3_upper_dbm"), ("IIP3 (dBm)", "iip3_dbm"),
    ("IIP3 +/- (dB)", "iip3_bound_db"), ("OIP3 (dBm)", "oip3_dbm"),
)


CONVENTION_WORDS = {"mean": "mean of lower and upper", "worse": "the worse (lower IIP3) of lower and upper"}


def convention_text(results: list[Result]) -> str:
    """What the results' IIP3/OIP3 columns are: the mean of lower and upper, or the worse."""
    conventions = {r.intercept_convention or "mean" for r in results} or {"mean"}
    return "; ".join(CONVENTION_WORDS[c] for c in sorted(conventions))


def _cell(value, field: str) -> str:
    spec = ".2f" if field.endswith("_bound_db") else "+.2f"  # a bound is a width, not signed
    text = "-" if value is None else format(value, spec)
    return f"<td>{html.escape(text)}</td>"


def level_section(session: Session, run: Run) -> str:
    """HTML: one row per stored level of every sweep of the run, or "" when none were stored."""
    rows = session.execute(select(Result, LevelResult).join(LevelResult, LevelResult.result_id == Result.id)
                           .where(Result.run_id == run.id)
                           .order_by(Result.temperature_c, Result.lo_dbm, Result.center_hz, Result.spacing_hz, Result.bias_v,
                                     LevelResult.tone_dbm)).all()
    if not rows:
        return ""
    head = "<th>sweep</th>" + "".join(f"<th>{html.escape(h)}</th>" for h, _ in _COLUMNS)
    body = []
    for result, level in rows:
        sweep = f"{format_freq(result.center_hz, 3)}, spacing {format_freq(result.spacing_hz)}"
        if result.bias_v is not None:
            sweep += f", gate {result.bias_v:.4f} V"
        if result.temperature_c is not None:
            sweep += f", {result.temperature_c:.1f} degC"
        if result.lo_dbm is not None:
            sweep += f", LO {result.lo_dbm:+.2f} dBm"
        body.append(f"<tr><td>{html.escape(sweep)}</td>" + "".join(_cell(getattr(level, f), f) for _, f in _COLUMNS) + "</tr>")
    note = ("IM3 re one tone: each product against its adjacent tone; re PEP: against the two tones' peak "
            "envelope power (4x one tone for equal tones, 6.02 dB). Single-point intercepts: IIP3 = Pin + delta/2.")
    return (f"<h2>IMD at each drive level</h2>\n<p>{html.escape(note)}</p>\n<table class=\"levels\">\n"
            f"<thead><tr>{head}</tr></thead>\n<tbody>\n" + "\n".join(body) + "\n</tbody>\n</table>\n")
