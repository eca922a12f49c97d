"""The plan's axes as data: expansion order, point keys, sweep keys, and a further axis declared once."""

from __future__ import annotations

import json
from pathlib import Path
from types import SimpleNamespace

from tonebench.config.plan_file import BiasSettings, load_plan
from tonebench.plan import axes
from tonebench.plan.axes import (
    AXES,
    GROUP_AXES,
    SWEEP_AXIS,
    Axis,
    axis_values,
    point_key_of,
    sweep_key_of,
)
from tonebench.plan.points import PlannedPoint, expand

PRE_LAYOUT = Path(__file__).resolve().parents[1] / "data" / "pre_layout"


def _sweep(**fields):
    """A [sweep] stand-in: lists per axis and the tone ramp, as SweepSettings gives them."""
    levels = fields.pop("levels")
    return SimpleNamespace(tone_levels=lambda: list(levels), **fields)


def test_the_key_is_one_part_per_axis_in_declared_order():
    point = PlannedPoint(0, 2.45e9, 1.0e6, -12.5)
    assert point.key == "c2450000000/d1000000/p-12.50"
    biased = PlannedPoint(0, 2.45e9, 1.0e6, -12.5, bias_v=0.35)
    assert biased.key == "c2450000000/d1000000/p-12.50/b+0.3500V"
    assert point_key_of({"center_hz": 2.45e9, "spacing_hz": 1.0e6, "tone_dbm": 3.0}) == "c2450000000/d1000000/p+3.00"


def test_every_axis_says_its_unit_plan_field_and_bench_setting():
    assert [axis.name for axis in AXES] == ["temperature", "lo", "center", "spacing", "tone", "bias"]
    assert [axis.unit for axis in AXES] == ["degC", "dBm", "Hz", "Hz", "dBm", "V"]
    assert all(axis.bench_setting for axis in AXES)
    assert SWEEP_AXIS.point_field == "tone_dbm" and SWEEP_AXIS not in GROUP_AXES


def test_expansion_is_centre_then_spacing_then_rising_tone_power():
    sweep = _sweep(center_freqs_hz=[2.0e9, 1.0e9], spacings_hz=[1.0e6, 5.0e5], levels=[-20.0, -10.0, 0.0])
    points = expand(SimpleNamespace(sweep=sweep))
    assert [p.seq for p in points] == list(range(12))
    assert [(p.center_hz, p.spacing_hz) for p in points[::3]] == [(2.0e9, 1.0e6), (2.0e9, 5.0e5), (1.0e9, 1.0e6),
                                                                 (1.0e9, 5.0e5)]
    assert [p.tone_dbm for p in points[:3]] == [-20.0, -10.0, 0.0]
    assert all(p.bias_v is None for p in points)


def test_a_sweep_is_every_point_that_differs_only_in_tone_power():
    sweep = _sweep(center_freqs_hz=[1.0e9, 2.0e9], spacings_hz=[1.0e6], levels=[-20.0, -10.0])
    points = expand(SimpleNamespace(sweep=sweep))
    assert points[0].sweep_key == points[1].sweep_key == (None, None, 1.0e9, 1.0e6, None)
    assert points[1].sweep_key != points[2].sweep_key
    # A stored point row carries the same fields; one function gives both the same key.
    row = SimpleNamespace(center_hz=2.0e9, spacing_hz=1.0e6, bias_v=None, tone_dbm=-10.0)
    assert sweep_key_of(row) == points[3].sweep_key


def test_an_axis_the_plan_names_is_iterated_outside_the_tone_ramp_and_joins_both_keys():
    # Gate bias comes from the plan's [bias] table: the plan expands over it.
    sweep = _sweep(center_freqs_hz=[1.0e9], spacings_hz=[1.0e6], levels=[-20.0, -10.0])
    points = expand(SimpleNamespace(sweep=sweep, bias=BiasSettings(gate_v=[0.3, 0.5])))
    assert [p.key for p in points] == [
        "c1000000000/d1000000/p-20.00/b+0.3000V", "c1000000000/d1000000/p-10.00/b+0.3000V",
        "c1000000000/d1000000/p-20.00/b+0.5000V", "c1000000000/d1000000/p-10.00/b+0.5000V",
    ]
    assert points[0].sweep_key == (None, None, 1.0e9, 1.0e6, 0.3) != points[2].sweep_key


def test_a_new_axis_is_one_declaration(monkeypatch):
    lo = Axis("lo_freq", "Hz", "lo_hz", lambda plan: getattr(plan.sweep, "lo_freqs_hz", None), "/lo{:.0f}", "lo_frequency",
              lambda hz: f"LO {hz:g} Hz")
    monkeypatch.setattr(axes, "AXES", (*AXES, lo))
    monkeypatch.setattr(axes, "GROUP_AXES", (*GROUP_AXES, lo))
    sweep = _sweep(center_freqs_hz=[1.0e9], spacings_hz=[1.0e6], lo_freqs_hz=[0.9e9, 1.1e9], levels=[-20.0])
    pairs = axes.axis_values(SimpleNamespace(sweep=sweep))
    assert [axis.name for axis, _ in pairs] == ["temperature", "lo", "center", "spacing", "bias", "lo_freq", "tone"]
    assert axes.point_key_of({"center_hz": 1.0e9, "spacing_hz": 1.0e6, "tone_dbm": -20.0, "lo_hz": 0.9e9}) \
        == "c1000000000/d1000000/p-20.00/lo900000000"
    assert axes.sweep_key_of(SimpleNamespace(center_hz=1.0e9, spacing_hz=1.0e6, lo_hz=0.9e9)) \
        == (None, None, 1.0e9, 1.0e6, None, 0.9e9)


def test_temperature_is_the_outermost_axis_and_leads_the_key():
    # A soak per temperature change: every point at one temperature comes before the next.
    sweep = _sweep(center_freqs_hz=[1.0e9, 2.0e9], spacings_hz=[1.0e6], temperatures_c=[85.0, -20.0], levels=[-20.0])
    points = expand(SimpleNamespace(sweep=sweep))
    assert [(p.temperature_c, p.center_hz) for p in points] == [(85.0, 1.0e9), (85.0, 2.0e9), (-20.0, 1.0e9),
                                                                (-20.0, 2.0e9)]
    assert points[2].key == "t-20.0C/c1000000000/d1000000/p-20.00"
    assert points[0].sweep_key == (85.0, None, 1.0e9, 1.0e6, None)


def test_a_stepped_lo_is_iterated_outside_frequency_and_joins_both_keys():
    # [mixer] lo_levels_dbm: every point at one LO level before the next (plan order kept).
    sweep = _sweep(center_freqs_hz=[1.0e9, 2.0e9], spacings_hz=[1.0e6], levels=[-20.0, -10.0])
    mixer = SimpleNamespace(lo_levels_dbm=[9.0, 1.0])
    points = expand(SimpleNamespace(sweep=sweep, mixer=mixer))
    assert [(p.lo_dbm, p.center_hz) for p in points[::2]] == [(9.0, 1.0e9), (9.0, 2.0e9), (1.0, 1.0e9), (1.0, 2.0e9)]
    assert points[4].key == "lo+1.00dBm/c1000000000/d1000000/p-20.00"
    assert points[0].sweep_key == (None, 9.0, 1.0e9, 1.0e6, None) != points[4].sweep_key
    assert axes.point_name_of_key(points[4].key) == "LO +1.00 dBm, 1 GHz, spacing 1 MHz, -20.00 dBm per tone"
    # A single lo_dbm is no axis: the points keep the keys they had.
    single = expand(SimpleNamespace(sweep=sweep, mixer=SimpleNamespace(lo_dbm=7.0, lo_levels_dbm=None)))
    assert single[0].lo_dbm is None and single[0].key == "c1000000000/d1000000/p-20.00"


def test_an_axis_the_plan_does_not_name_leaves_no_trace():
    sweep = _sweep(center_freqs_hz=[1.0e9], spacings_hz=[1.0e6], levels=[0.0])
    assert {axis.name: list(values) for axis, values in axis_values(SimpleNamespace(sweep=sweep))}["bias"] == [None]


def test_the_sample_plans_expand_to_the_keys_the_old_code_gave():
    # plan_keys.json was written by the code before the layout change (tests/data/pre_layout/README.md).
    expected = json.loads((PRE_LAYOUT / "plan_keys.json").read_text())
    assert expected
    for name, keys in expected.items():
        plan = load_plan(PRE_LAYOUT / "plans" / name)
        assert [p.key for p in expand(plan.settings)] == keys
