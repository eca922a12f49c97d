"""The frequency plan of a mixer plan: LO, IF frequencies, their checks, and predicted spurs."""

from __future__ import annotations

import pytest
from conftest import SAMPLE_RUNS

from tonebench.config.bench_file import load_bench
from tonebench.config.mixer_settings import MixerSettings
from tonebench.config.plan_file import PlanFile
from tonebench.errors import InputError
from tonebench.instruments.open_bench import bench_freq_ranges
from tonebench.plan.frequency_plan import (
    check_frequency_plan,
    check_lo_power,
    if_frequencies,
    predicted_spurs,
)
from tonebench.planes.loss_table import LossTable

F1_HZ, F2_HZ = 2.449e9, 2.451e9


def mixer(**fields) -> MixerSettings:
    return MixerSettings.model_validate({"lo_dbm": 7.0, **fields})


def test_low_side_difference_keeps_the_order():
    freqs = if_frequencies(mixer(lo_hz=2.3e9), F1_HZ, F2_HZ)
    assert (freqs.f1_hz, freqs.f2_hz) == pytest.approx((149e6, 151e6))
    assert (freqs.lower_hz, freqs.upper_hz) == pytest.approx((147e6, 153e6))
    assert not freqs.inverted


def test_high_side_difference_inverts_lower_and_upper():
    freqs = if_frequencies(mixer(lo_hz=2.6e9, injection="high"), F1_HZ, F2_HZ)
    # f_LO - f: the RF's lower product 2f1-f2 = 2.447 GHz lands at 153 MHz, above both tones.
    assert (freqs.f1_hz, freqs.f2_hz) == pytest.approx((151e6, 149e6))
    assert (freqs.lower_hz, freqs.upper_hz) == pytest.approx((153e6, 147e6))
    assert freqs.inverted


def test_sum_output_and_the_if_form():
    freqs = if_frequencies(mixer(if_hz=5.0e9, output="sum", injection="high"), F1_HZ, F2_HZ)
    assert freqs.lo_hz == pytest.approx(2.55e9)
    assert freqs.lower_hz == pytest.approx(2.447e9 + 2.55e9)
    low = if_frequencies(mixer(if_hz=150e6), F1_HZ, F2_HZ)
    high = if_frequencies(mixer(if_hz=150e6, injection="high"), F1_HZ, F2_HZ)
    assert (low.lo_hz, high.lo_hz) == pytest.approx((2.3e9, 2.6e9))


def test_an_lo_on_the_wrong_side_is_one_clear_line():
    with pytest.raises(InputError) as caught:
        if_frequencies(mixer(lo_hz=2.3e9, injection="high"), F1_HZ, F2_HZ)
    message = str(caught.value)
    assert "\n" not in message and 'injection = "high" needs the LO above' in message and "2.3 GHz" in message


def test_the_plan_file_takes_one_of_lo_hz_and_if_hz():
    with pytest.raises(ValueError, match="exactly one of lo_hz"):
        mixer(lo_hz=2.3e9, if_hz=150e6)
    with pytest.raises(ValueError, match="exactly one of lo_hz"):
        mixer()


def test_ranges_of_the_analyzer_and_the_output_calibration_are_checked():
    bench = load_bench(SAMPLE_RUNS / "mixer_bench.toml")
    ranges = bench_freq_ranges(bench.settings)
    out = LossTable.from_rows("out", bench.settings.offsets.out, "bench offsets")
    check_frequency_plan(mixer(lo_hz=2.3e9), [(F1_HZ, F2_HZ)], 10e3, ranges, out, "plan")  # fits
    # Sum output at 4.75 GHz: within the analyzer's range, beyond the output table (2.6 GHz).
    with pytest.raises(InputError, match=r"f1 at the IF \(4.749 GHz\): .*no 'out' loss at"):
        check_frequency_plan(mixer(lo_hz=2.3e9, output="sum"), [(F1_HZ, F2_HZ)], 10e3, ranges, out, "plan")
    # Sum output at 8.45 GHz: beyond the analyzer's range.
    with pytest.raises(InputError, match=r"f1 at the IF needs .* analyzer"):
        check_frequency_plan(mixer(lo_hz=6.0e9, injection="high", output="sum"), [(F1_HZ, F2_HZ)], 10e3,
                             ranges, out, "plan")


def test_lo_power_is_checked_against_the_bench_limit():
    check_lo_power(mixer(lo_hz=2.3e9, lo_dbm=13.0), 13.0, "plan")
    with pytest.raises(InputError, match="lo_dbm 14.00 dBm is above the bench limit max_lo_dbm 13.00 dBm"):
        check_lo_power(mixer(lo_hz=2.3e9, lo_dbm=14.0), 13.0, "plan")
    with pytest.raises(InputError, match="the bench has no lo source"):
        check_lo_power(mixer(lo_hz=2.3e9), None, "plan")


def test_every_stepped_lo_level_is_checked_against_the_bench_limit():
    stepped = MixerSettings.model_validate({"lo_hz": 2.3e9, "lo_levels_dbm": [9.0, 13.0, 1.0]})
    check_lo_power(stepped, 13.0, "plan")
    with pytest.raises(InputError, match="lo_levels_dbm level 13.00 dBm is above the bench limit max_lo_dbm 12.50"):
        check_lo_power(stepped, 12.5, "plan")


@pytest.mark.parametrize("fields, words", [
    ({"lo_dbm": 7.0, "lo_levels_dbm": [7.0]}, "give exactly one of lo_dbm"),
    ({}, "give exactly one of lo_dbm"),
    ({"lo_levels_dbm": [7.0, 7.0]}, "lo_levels_dbm repeats a level"),
    ({"lo_levels_dbm": [7.0, 31.0]}, "lo_levels_dbm values must lie within -150..30 dBm"),
])
def test_lo_power_is_one_level_or_a_list_of_distinct_levels(fields, words):
    with pytest.raises(ValueError, match=words):
        MixerSettings.model_validate({"lo_hz": 2.3e9, **fields})


def test_a_spur_placed_on_an_im3_frequency_is_predicted_with_its_orders():
    # LO at f2/2: 2*f1 - 3*LO = 2f1 - f2 - LO, exactly the lower IM3 at the IF (worked by hand).
    lo_hz = F2_HZ / 2.0
    spurs = predicted_spurs(mixer(lo_hz=lo_hz), F1_HZ, F2_HZ, rbw_hz=1e3)
    assert any((s.m, s.n, s.tone, s.near) == (-3, 2, "f1", "lower") and abs(s.offset_hz) < 1.0 for s in spurs)


def test_no_spur_near_the_im3_of_an_ordinary_plan():
    assert predicted_spurs(mixer(lo_hz=2.3e9), F1_HZ, F2_HZ, rbw_hz=1e3) == []


def test_a_plan_file_with_a_mixer_table_loads():
    plan = PlanFile.model_validate({
        "plan": {"name": "m"}, "device": {"part_number": "TBM-150", "serial": "1"},
        "sweep": {"center_freqs_hz": [2.45e9], "spacings_hz": [2e6], "tone_levels_dbm": [-30.0]},
        "mixer": {"lo_hz": 2.3e9, "lo_dbm": 7.0}})
    assert plan.mixer.injection == "low" and plan.mixer.output == "difference"
