"""The axes a plan expands over, each declared once: what it is called, its unit, the plan field
its values come from, the point field that holds its value, its part of the point key, and how a
run sets it on the bench.

Today's axes: chamber temperature (outermost: a soak per change), LO power from a mixer plan's
[mixer] lo_levels_dbm (outside frequency: an LO level change settles slower than a frequency
step, see DEVELOPERS.md "Mixers"), centre frequency, tone spacing and tone power from the plan's
[sweep], and gate bias from its [bias] table (an axis the plan does not name is None, leaving no
trace in a key).

A sweep (what one fit runs over) is every point that differs only in the SWEEP_AXIS, tone power.
`sweep_key_of` gives its key from a planned point or a stored point row, so the sequencer, the store and the results
group points with one definition.

Adding an axis (gate bias from a plan, temperature, LO frequency, device position):
1. the plan field in config/plan_file.py (a table's model), e.g. `temperatures_c: list[float] | None`;
2. a field with its unit on PlannedPoint (plan/points.py), defaulting to None so older callers and
   stored points without it keep their keys, and the column of the same name on the point record;
3. one Axis in AXES below, e.g. `Axis("lo_freq", "Hz", "lo_hz", _plan_field("mixer", "lo_freqs_hz"),
   "/f{:.0f}", "lo_frequency", lambda hz: f"LO {format_freq(hz)}")`. Its place in AXES is its place in the key; every axis other
   than tone power is iterated outside the tone-power ramp in AXES order, and becomes part of the
   sweep key;
4. the run dispatches on `bench_setting` ("lo_frequency") to whatever sets it.
An axis whose value is None (not in the plan) adds nothing to the key, so existing plans keep
their points and keys.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
import re
from dataclasses import dataclass

from tonebench.units import format_freq

SweepKey = tuple  # the point's value on every axis but the sweep axis, in AXES order


@dataclass(frozen=True)
class Axis:
    """One axis. plan_values gives its values from the plan (None: not in this plan);
    key_format renders its value into the point key; bench_setting names how the run sets it."""

    name: str
    unit: str
    point_field: str
    plan_values: Callable[[object], Sequence[float] | None]
    key_format: str
    bench_setting: str
    describe: Callable[[float], str]  # the value as a reader names it, e.g. "spacing 1 MHz"

    def key_part(self, value: float | None) -> str:
        return "" if value is None else self.key_format.format(value)

    def key_pattern(self) -> str:
        """A regular expression for key_part, the value captured (optional: None leaves no trace)."""
        before, _, rest = self.key_format.partition("{")
        after = rest.partition("}")[2]
        return f"(?:{re.escape(before)}([-+]?[0-9.]+){re.escape(after)})?"


def _plan_field(table: str, name: str) -> Callable[[object], Sequence[float] | None]:
    return lambda plan: getattr(getattr(plan, table, None), name, None)


def _tone_levels(plan) -> Sequence[float]:
    return plan.sweep.tone_levels()


def _gate_voltages(plan) -> Sequence[float] | None:
    bias = getattr(plan, "bias", None)
    return None if bias is None else bias.gate_voltages_v()


TEMPERATURE = Axis("temperature", "degC", "temperature_c", _plan_field("sweep", "temperatures_c"), "t{:+.1f}C/",
                   "chamber_temperature", lambda c: f"{c:.1f} degC")
CENTER = Axis("center", "Hz", "center_hz", _plan_field("sweep", "center_freqs_hz"), "c{:.0f}", "tone_frequencies",
              format_freq)
SPACING = Axis("spacing", "Hz", "spacing_hz", _plan_field("sweep", "spacings_hz"), "/d{:.0f}", "tone_frequencies",
               lambda hz: f"spacing {format_freq(hz)}")
TONE = Axis("tone", "dBm", "tone_dbm", _tone_levels, "/p{:+.2f}", "tone_power", lambda dbm: f"{dbm:+.2f} dBm per tone")
BIAS = Axis("bias", "V", "bias_v", _gate_voltages, "/b{:+.4f}V", "gate_bias", lambda v: f"gate {v:.4f} V")
# Only a stepped LO (lo_levels_dbm) is an axis; a plan's single lo_dbm leaves the point at None.
LO = Axis("lo", "dBm", "lo_dbm", _plan_field("mixer", "lo_levels_dbm"), "lo{:+.2f}dBm/", "lo_power",
          lambda dbm: f"LO {dbm:+.2f} dBm")

AXES: tuple[Axis, ...] = (TEMPERATURE, LO, CENTER, SPACING, TONE, BIAS)  # key order
SWEEP_AXIS = TONE  # a fit runs over this axis; it is iterated innermost, rising
GROUP_AXES: tuple[Axis, ...] = tuple(axis for axis in AXES if axis is not SWEEP_AXIS)
GROUP_FIELDS: tuple[str, ...] = tuple(axis.point_field for axis in GROUP_AXES)


def point_key_of(values: dict[str, float | None]) -> str:
    """The stable key of a point from its value on every axis (by point field)."""
    return "".join(axis.key_part(values.get(axis.point_field)) for axis in AXES)


def point_name(values: dict[str, float | None]) -> str:
    """A point as a reader names it, e.g. '2.45 GHz, spacing 1 MHz, -20.00 dBm per tone'."""
    return ", ".join(axis.describe(values[axis.point_field]) for axis in AXES
                     if values.get(axis.point_field) is not None)


_KEY_PATTERN = re.compile("".join(axis.key_pattern() for axis in AXES) + "$")


def point_name_of_key(point_key: str) -> str:
    """The reader's name of a stored point key (the key itself if it is not one of ours)."""
    match = _KEY_PATTERN.match(point_key)
    if match is None or not any(match.groups()):
        return point_key
    return point_name({axis.point_field: None if text is None else float(text)
                       for axis, text in zip(AXES, match.groups())})


def sweep_key_of(record) -> SweepKey:
    """The key of the sweep a point belongs to: its value on every axis but tone power, read by
    point field from a planned point or a stored point row (a missing field is None)."""
    return tuple(getattr(record, axis.point_field, None) for axis in GROUP_AXES)


def group_of(key: SweepKey) -> dict[str, float | None]:
    """A sweep key as point field -> value (the columns a stored result has for its sweep)."""
    return dict(zip(GROUP_FIELDS, key))


def axis_values(plan) -> list[tuple[Axis, Sequence[float | None]]]:
    """Each axis with the values the plan gives it, in iteration order (the sweep axis last);
    an axis the plan does not name has the single value None."""
    ordered = [*GROUP_AXES, SWEEP_AXIS]
    pairs = []
    for axis in ordered:
        values = axis.plan_values(plan)
        pairs.append((axis, (None,) if values is None else values))
    return pairs
