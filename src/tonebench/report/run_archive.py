"""What an archived run report must hold beyond the figures: the instruments with their *IDN?,
the software and calibration, the breakdown of each ± bound, the analyzer settings of every
point, and the run's events. Read from the stored run; every section is plain HTML tables."""

from __future__ import annotations

import html

from tonebench.store.models import Run

# Bound terms as analysis/bound.py names them, in words for the table's head.
_TERM_WORDS = {
    "level": "analyzer level accuracy",
    "source": "sources' own IM3",
    "analyzer": "analyzer's own IM3",
    "compression": "compression",
    "scatter": "reading scatter",
    "noise": "noise",
}


def _row(cells: list[str], numeric: set[int] = frozenset()) -> str:
    return "<tr>" + "".join(f'<td class="num">{html.escape(c)}</td>' if i in numeric else f"<td>{html.escape(c)}</td>"
                            for i, c in enumerate(cells)) + "</tr>"


def _table(head: list[str], rows: list[str], css_class: str = "archive") -> str:
    header = "".join(f"<th>{html.escape(h)}</th>" for h in head)
    return f'<table class="{css_class}">\n<thead><tr>{header}</tr></thead>\n<tbody>\n' + "\n".join(rows) + "\n</tbody>\n</table>"


def _num(value: float | None, spec: str = ".2f") -> str:
    return "–" if value is None else format(value, spec)


def instruments_section(run: Run) -> str:
    rows = [_row([i.role, i.dialect, i.resource, i.idn]) for i in sorted(run.instruments, key=lambda i: i.role)]
    return "<h2>Instruments</h2>\n" + _table(["role", "dialect", "resource", "*IDN?"], rows)


def provenance_section(run: Run) -> str:
    """Software, host and calibration, as a definition list."""
    cal = run.calibration_set
    items = {
        "tonebench": run.software_version,
        "Host": run.host,
        "Ended (UTC)": "–" if run.ended_at is None else run.ended_at.strftime("%Y-%m-%d %H:%M:%S"),
        "Calibration set": "none (the bench file's [offsets])" if cal is None else
        f"{cal.name}, {cal.method}, made {cal.created_at:%Y-%m-%d %H:%M} UTC, valid {cal.valid_days:g} days, "
        f"{cal.freq_min_hz / 1e9:.4g} to {cal.freq_max_hz / 1e9:.4g} GHz",
    }
    stale = [e.message for e in run.events if e.kind == "calibration-stale"]
    if stale:
        items["Calibration status"] = stale[0]
    body = "\n".join(f"<dt>{html.escape(k)}</dt><dd>{html.escape(v)}</dd>" for k, v in items.items())
    return f'<h2>Software and calibration</h2>\n<dl class="summary">\n{body}\n</dl>'


def bound_section(bounds: list[tuple[str, float | None, dict[str, float]]]) -> str:
    """Each sweep's ± bound and the terms it is made of (dB): (sweep title, bound, terms) each,
    from the assessment the page shows (stored, or made again)."""
    terms = list(dict.fromkeys(t for _, _, parts in bounds for t in parts))
    if not terms:
        return ""
    rows = [_row([title, _num(bound_db)] + [_num(parts.get(t)) for t in terms], set(range(1, len(terms) + 2)))
            for title, bound_db, parts in bounds]
    head = ["sweep", "± bound (dB)"] + [f"{_TERM_WORDS.get(t, t)} (dB)" for t in terms]
    note = ('<p class="note">Each term is the IIP3 error it can cause on its own; the bound adds the systematic '
            "terms and the root-sum-square of the random ones (scatter, noise).</p>")
    return "<h2>What each ± bound is made of</h2>\n" + note + _table(head, rows)


def settings_section(run: Run) -> str:
    """The analyzer settings of every point, folded (a long run has hundreds)."""
    points = sorted(run.points, key=lambda p: p.seq)
    rows = [_row([p.point_key, p.status, _num(p.tone_dbm), _num(p.rbw_hz, "g"), _num(p.vbw_hz, "g"),
                  _num(p.span_hz, "g"), _num(p.atten_db, "g"), _num(p.sweep_time_s, ".3f")], {2, 3, 4, 5, 6, 7})
            for p in points]
    table = _table(["point", "status", "tone (dBm)", "RBW (Hz)", "VBW (Hz)", "span (Hz)", "attenuation (dB)",
                    "sweep time (s)"], rows)
    return (f"<h2>Analyzer settings per point</h2>\n<details><summary>{len(points)} points (open to show)</summary>\n"
            f"{table}\n</details>")


def events_section(run: Run) -> str:
    events = sorted(run.events, key=lambda e: (e.at, e.id))
    rows = [_row([f"{e.at:%Y-%m-%d %H:%M:%S}", e.level, e.kind, e.message]) for e in events]
    return "<h2>Events</h2>\n" + (_table(["time (UTC)", "level", "kind", "message"], rows) if rows
                                  else '<p class="note">No events.</p>')


def archive_html(run: Run, bounds: list[tuple[str, float | None, dict[str, float]]]) -> str:
    """Every archive section, in reading order."""
    return "\n".join(part for part in (provenance_section(run), instruments_section(run), bound_section(bounds),
                                       settings_section(run), events_section(run)) if part)
