"""Terminal tables: compact result rows (the HTML report has the full ones), tables that keep to
the terminal's width by leaving out their least important columns, and the colour of verdicts
and status words."""

from __future__ import annotations

from rich import box
from rich.console import Console
from rich.measure import Measurement
from rich.table import Table
from rich.text import Text

from tonebench.store.models import Result
from tonebench.units import format_freq

# Colours of the words a reader looks for first (common practice: green good, red bad, yellow
# needs attention, dim for "nothing to judge").
WORD_STYLES = {
    "pass": "green", "fail": "bold red", "no-limit": "dim",
    "complete": "green", "valid": "green", "done": "green",
    "paused": "yellow", "stale": "yellow", "waiting": "yellow", "running": "cyan",
    "aborted": "bold red", "expired": "bold red", "failed": "bold red", "interrupted": "bold red",
}


def styled(word: str | None) -> Text:
    """A verdict or status word in its colour ('-' when there is none)."""
    word = word or "-"
    return Text(word, style=WORD_STYLES.get(word, ""))


def fitted_table(console: Console, title: str, rows: list[dict[str, str | Text]], priorities: dict[str, int],
                 wrapping: tuple[str, ...] = ()) -> Table:
    """A table of `rows` (column -> cell) that fits the console's width: while it is too wide,
    the column of lowest priority goes (ties: the rightmost). No number is ever cut short;
    columns in `wrapping` (free text) may wrap instead. The title says what was left out."""
    columns = list(rows[0]) if rows else list(priorities)
    dropped: list[str] = []
    while True:
        note = "" if not dropped else f" [not shown at this width: {', '.join(dropped)}]"
        table = _table(title + note, rows, columns, wrapping)
        # Every number at its full width; free text needs at least WRAP_MIN_WIDTH.
        fixed = _table("", rows, [c for c in columns if c not in wrapping], ())
        free = sum(WRAP_MIN_WIDTH + 1 for c in columns if c in wrapping)
        # Measured unclamped: the console's own options would cap it at its width.
        needed = Measurement.get(console, console.options.update_width(100_000), fixed).maximum + free
        droppable = [c for c in columns if priorities.get(c, 0) < max(priorities.values())]
        if needed <= console.width or not droppable:
            return table
        lowest = min(droppable, key=lambda c: (priorities.get(c, 0), -columns.index(c)))
        columns.remove(lowest)
        dropped.append(lowest)


WRAP_MIN_WIDTH = 12


def _table(title: str, rows, columns: list[str], wrapping: tuple[str, ...]) -> Table:
    table = Table(title=Text(title) if title else None, box=box.SIMPLE_HEAD, padding=(0, 1), pad_edge=False,
                  collapse_padding=True, show_edge=False,
                  title_justify="left")
    for column in columns:
        table.add_column(column, no_wrap=column not in wrapping,
                         min_width=WRAP_MIN_WIDTH if column in wrapping else None)
    for row in rows:
        table.add_row(*(row[c] for c in columns))
    return table


def _fmt(value, spec: str = "+.2f") -> str:
    return "-" if value is None else format(value, spec)


def flag_names(flags) -> str:
    """Flag labels of a result, each once, e.g. 'analyzer-limited (noise), slope'."""
    names: list[str] = []
    for f in flags:
        label = f.flag if f.cause is None else f"{f.flag} ({f.cause})"
        if label not in names:
            names.append(label)
    return ", ".join(names)


# Which columns of a results table go first when the terminal is narrow (lowest first); the
# frequency and the IIP3 with its bound are never left out.
RESULT_PRIORITIES = {"degC": 8, "LO dBm": 8, "Center": 10, "Spacing": 7, "Gate V": 8, "Gain": 6, "IIP3": 10, "OIP3": 5,
                     "Slope": 3, "P1dB": 2, "Valid": 4, "Verdict": 9, "Flags": 1, "Note": 0}


def terminal_row(result: Result) -> dict[str, str | Text]:
    """A compact row for a terminal table (the HTML report has the full one); dB and dBm."""
    return {
        "degC": "" if result.temperature_c is None else f"{result.temperature_c:.1f}",
        "LO dBm": "" if result.lo_dbm is None else f"{result.lo_dbm:+.2f}",
        "Center": format_freq(result.center_hz),
        "Spacing": format_freq(result.spacing_hz),
        "Gate V": "" if result.bias_v is None else f"{result.bias_v:.4f}",
        "Gain": _fmt(result.gain_db, ".2f"),
        # Lower and upper intercepts are in the report; the bound is what a reader must see here.
        "IIP3": _fmt(result.iip3_dbm) + ("" if result.iip3_bound_db is None else f" ±{result.iip3_bound_db:.2f}"),
        "OIP3": _fmt(result.oip3_dbm),
        "Slope": _fmt(None if result.slope_im3_lower is None else (result.slope_im3_lower + result.slope_im3_upper) / 2, ".2f"),
        "P1dB": _fmt(result.p1db_in_dbm),
        "Valid": f"{result.n_valid}/{result.n_points}",
        "Verdict": styled(result.verdict),
        "Flags": flag_names(result.flags) or "-",
        "Note": result.reason or "",
    }
