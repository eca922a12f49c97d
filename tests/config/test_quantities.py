"""Plan and bench files take quantities with units ("2.45 GHz", "-20 dBm", "5 min") where they
take numbers in the field's own unit (issue 12, item 6)."""

from __future__ import annotations

import pytest
from cli_invoke import invoke
from conftest import SAMPLE_RUNS
from hardware_benches import one_error_line

from tonebench.config.bench_file import load_bench
from tonebench.config.plan_file import load_plan
from tonebench.config.quantities import parse_quantity, unit_kind
from tonebench.plan.points import expand

PLAN_TEXT = (SAMPLE_RUNS / "demo_plan.toml").read_text()


@pytest.mark.parametrize("text, kind, value", [
    ("2.45 GHz", "hz", 2.45e9), ("2.4815GHz", "hz", 2.4815e9), ("10 kHz", "hz", 1e4), ("1e6 Hz", "hz", 1e6),
    ("-20.5 dBm", "dbm", -20.5), ("3 dB", "db", 3.0), ("150 mV", "v", 0.15), ("-1.2 V", "v", -1.2),
    ("2 mA", "a", 2e-3), ("500 ms", "s", 0.5), ("5 min", "s", 300.0), ("-40 degC", "c", -40.0), ("85 °C", "c", 85.0),
])
def test_quantities_are_read_in_the_field_unit(text, kind, value):
    assert parse_quantity(text, kind) == value  # exactly the float the plain number would give


@pytest.mark.parametrize("text, kind, words", [
    ("2.45 dBm", "hz", "'dBm' is not a unit of a frequency; allowed: Hz, kHz, MHz, GHz"),
    ("1 MHZ", "hz", "'MHZ' is not a unit"),  # SI prefixes as SI writes them: no guessing
    ("1 mhz", "hz", "'mhz' is not a unit"),
    ("fast", "s", "is not a time"),
    ("", "v", "is not a voltage"),
])
def test_a_wrong_unit_is_named_with_the_allowed_ones(text, kind, words):
    with pytest.raises(ValueError, match=words.replace("(", r"\(")):
        parse_quantity(text, kind)


def test_only_fields_named_with_a_unit_take_quantities():
    assert unit_kind("center_freqs_hz") == "hz" and unit_kind("dwell_s") == "s" and unit_kind("min_c") == "c"
    assert unit_kind("ramp_v_per_s") is None and unit_kind("name") is None and unit_kind("point_attempts") is None


def test_a_plan_with_quantities_expands_to_the_same_points(tmp_path):
    plain = tmp_path / "plain.toml"
    plain.write_text(PLAN_TEXT)
    text = PLAN_TEXT.replace("center_freqs_hz = [2.40e9, 2.45e9, 2.48e9]", 'center_freqs_hz = ["2.40 GHz", "2.45 GHz", "2.48 GHz"]')
    text = text.replace("spacings_hz = [1.0e6]", 'spacings_hz = ["1 MHz"]')
    assert '"2.48 GHz"' in text and '"1 MHz"' in text, "the sample plan changed: update the replacements"
    with_units = tmp_path / "units.toml"
    with_units.write_text(text)
    assert [p.key for p in expand(load_plan(with_units).settings)] == [p.key for p in expand(load_plan(plain).settings)]
    assert load_plan(with_units).settings.sweep.center_freqs_hz == [2.40e9, 2.45e9, 2.48e9]


def test_a_bench_file_takes_quantities_too(tmp_path):
    text = (SAMPLE_RUNS / "bias_chamber_bench.toml").read_text()
    assert "\ndwell_s = 300.0\n" in text, "the sample bench changed: update the replacement"
    bench = tmp_path / "bench.toml"
    bench.write_text(text.replace("\ndwell_s = 300.0\n", '\ndwell_s = "2 min"\n'))
    assert load_bench(bench).settings.chamber.dwell_s == 120.0


def test_a_plan_with_a_wrong_unit_is_one_line_and_nothing_written(tmp_path):
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN_TEXT.replace("spacings_hz = [1.0e6]", 'spacings_hz = ["1 dBm"]'))
    result = invoke("run", plan, "--bench", SAMPLE_RUNS / "sim_bench.toml", "--db", tmp_path / "t.db")
    assert result.exit_code == 2
    line = one_error_line(result)
    assert "field 'sweep.spacings_hz'" in line and "'dBm' is not a unit of a frequency" in line
    assert not (tmp_path / "t.db").exists()
