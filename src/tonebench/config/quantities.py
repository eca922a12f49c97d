"""Quantities with units in plan and bench files: `"2.45 GHz"`, `"-20 dBm"`, `"500 ms"` where a
plain number in the field's own unit (the suffix of its name: `_hz`, `_dbm`, `_v`, ...) is also
accepted. The unit must be one of that field's kind: "2.45 dBm" in a frequency field is refused,
never guessed at. SI prefixes are case-sensitive, as SI writes them (mV is not MV)."""

from __future__ import annotations

import re
from decimal import Decimal

# Field-name suffix -> (what it is, {unit: factor to the field's unit}).
UNITS: dict[str, tuple[str, dict[str, float]]] = {
    "hz": ("a frequency", {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6, "GHz": 1e9}),
    "dbm": ("a power in dBm", {"dBm": 1.0}),
    "db": ("a ratio in dB", {"dB": 1.0}),
    "v": ("a voltage", {"V": 1.0, "mV": 1e-3, "uV": 1e-6, "µV": 1e-6}),
    "a": ("a current", {"A": 1.0, "mA": 1e-3, "uA": 1e-6, "µA": 1e-6, "nA": 1e-9}),
    "s": ("a time", {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "min": 60.0, "h": 3600.0}),
    "c": ("a temperature in degC", {"degC": 1.0, "°C": 1.0, "C": 1.0}),
    "ohm": ("a resistance", {"ohm": 1.0, "kohm": 1e3, "Ω": 1.0, "kΩ": 1e3}),
}
_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([^\d\s.+-][^\s]*)\s*$")


def unit_kind(field_name: str) -> str | None:
    """The unit suffix of a field name ('center_freqs_hz' -> 'hz'), or None (also for a rate
    such as 'ramp_v_per_s', which is no time)."""
    if "_per_" in field_name:
        return None
    suffix = field_name.rsplit("_", 1)[-1] if "_" in field_name else ""
    return suffix if suffix in UNITS else None


def parse_quantity(text: str, kind: str) -> float:
    """'2.45 GHz' -> 2.45e9 for kind 'hz'; ValueError naming the allowed units otherwise."""
    what, scales = UNITS[kind]
    allowed = ", ".join(scales)
    match = _QUANTITY.match(text)
    if match is None:
        raise ValueError(f"{text!r} is not {what}; give a number or a number with a unit ({allowed})")
    number, unit = match.groups()
    if unit not in scales:
        raise ValueError(f"{text!r}: {unit!r} is not a unit of {what}; allowed: {allowed}")
    # In decimal, so that "2.45 GHz" is the same float as 2.45e9 typed as a number.
    return float(Decimal(number) * Decimal(repr(scales[unit])))


def with_units(value, field_name: str):
    """A field's raw value with any quantity strings (alone or in a list) turned into numbers in
    the field's unit; anything else is returned as it is, for the field's own validation."""
    kind = unit_kind(field_name)
    if kind is None:
        return value
    if isinstance(value, str):
        return parse_quantity(value, kind)
    if isinstance(value, list):
        return [parse_quantity(item, kind) if isinstance(item, str) else item for item in value]
    return value
