"""The plane arithmetic both ways, and the referral of a stored row through it."""

from __future__ import annotations

import pytest

from tonebench.planes import arithmetic
from tonebench.planes.referral import referred_values


def test_source_setting_and_tone_at_the_plane_are_inverse():
    # 7.5 dB of input loss: -12 dBm at the DUT input needs -4.5 dBm at the source.
    assert arithmetic.source_setting_dbm(-12.0, 7.5) == -4.5
    assert arithmetic.tone_at_plane_dbm(-4.5, 7.5) == -12.0


def test_dut_output_and_analyzer_input_are_inverse():
    # 3.25 dB of output loss: the analyzer reads -40 dBm for -36.75 dBm at the DUT output.
    assert arithmetic.dut_output_dbm(-40.0, 3.25) == -36.75
    assert arithmetic.analyzer_input_dbm(-36.75, 3.25) == -40.0


def test_two_equal_tones_carry_twice_the_power_of_one():
    assert arithmetic.TWO_EQUAL_TONES_DB == pytest.approx(3.0103, abs=1e-4)  # 10 log10(2)


def test_referral_goes_through_the_same_arithmetic():
    row = {"source1_dbm": -4.5, "source2_dbm": -3.0, "source1_correction_db": None, "source2_correction_db": 0.2,
           "pin1_dbm": None, "pin2_dbm": -11.9, "raw_f1_dbm": -40.0, "raw_lower_dbm": -90.0}
    offsets = {"in1_loss_db": 7.5, "in2_loss_db": 9.0, "out_loss_f1_db": 3.25, "out_loss_lower_db": 3.5}
    values = referred_values(row, offsets)
    assert values["pin1_dbm"] == -12.0  # open loop: setting less the input loss
    assert values["pin2_dbm"] == -11.9  # leveled: the meter's figure at the plane, no loss
    assert values["pout_f1_dbm"] == -36.75
    assert values["im3_lower_dbm"] == -86.5
    assert values["pout_f2_dbm"] is None  # no reading
