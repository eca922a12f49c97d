"""Compact result rows for terminal tables (the HTML report has the full ones)."""

from __future__ import annotations



from tonebench.store.models import (
    Result,
)


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


def terminal_row(result: Result) -> dict[str, str]:
    """A compact row for a terminal table (the HTML report has the full one); dB and dBm."""
    return {
        "degC": "" if result.temperature_c is None else f"{result.temperature_c:.1f}",
        "GHz": f"{result.center_hz / 1e9:.4f}",
        "Spacing": f"{result.spacing_hz / 1e6:.3g} MHz",
        "Gate V": "" if result.bias_v is None else f"{result.bias_v:.4f}",
        "Gain": _fmt(result.gain_db, ".2f"),
        # Lower and upper intercepts are in the report; the bound is what a reader must see here.
        "IIP3": _fmt(result.iip3_dbm) + ("" if result.iip3_bound_db is None else f" ±{result.iip3_bound_db:.2f}"),
        "OIP3": _fmt(result.oip3_dbm),
        "Slope": _fmt(None if result.slope_im3_lower is None else (result.slope_im3_lower + result.slope_im3_upper) / 2, ".2f"),
        "P1dB": _fmt(result.p1db_in_dbm),
        "Valid": f"{result.n_valid}/{result.n_points}",
        "Flags": flag_names(result.flags) or "-",
        "Note": result.reason or "",
    }
