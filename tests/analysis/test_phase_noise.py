"""The reciprocal-mixing check (analysis/phase_noise.py) on numbers worked by hand.

Reciprocal mixing (common practice, from memory): a tone of power P with LO phase noise L(df) dBc/Hz
puts P + L(df) + 10 log10(ENBW) on a product df away; ENBW of a Gaussian RBW filter = 1.0645 RBW.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tonebench.analysis.phase_noise import check_phase_noise, phase_noise_result, reciprocal_floor_dbm
from tonebench.analysis.settings import AnalysisSettings


def test_the_floor_by_hand():
    # Tones -10 dBm each, L = -90 dBc/Hz at 10 kHz: the adjacent tone's skirt at 10 kHz is -100 dBm/Hz,
    # the far tone's at 20 kHz 6.02 dB lower; through 300 Hz RBW (319.4 Hz noise bandwidth).
    want = 10 * math.log10(10 ** -10 + 10 ** (-10.602)) + 10 * math.log10(1.0645 * 300)
    assert float(reciprocal_floor_dbm(-10.0, -10.0, 1e4, 300.0, -90.0, 1e4)) == pytest.approx(want, abs=0.005)
    # Ten times the spacing: both skirts 20 dB lower.
    assert float(reciprocal_floor_dbm(-10.0, -10.0, 1e5, 300.0, -90.0, 1e4)) == pytest.approx(want - 20, abs=0.005)


def arrays(lower_dbm, noise_dbm=-120.0):
    n = len(lower_dbm)
    lower = np.asarray(lower_dbm, dtype=float)
    return {"tone_dbm": np.full(n, -20.0), "raw_f1_dbm": np.full(n, -10.0), "raw_f2_dbm": np.full(n, -10.0),
            "raw_lower_dbm": lower, "raw_upper_dbm": lower + 1.0, "rbw_hz": np.full(n, 300.0),
            "raw_noise_lower_dbm": np.full(n, noise_dbm), "raw_noise_upper_dbm": np.full(n, noise_dbm)}


SETTINGS = AnalysisSettings(phase_noise_dbc_per_hz=-90.0, phase_noise_offset_hz=1e4, spacing_hz=1e4)


def test_a_product_within_10_db_of_the_floor_is_flagged_with_its_error():
    floor = float(reciprocal_floor_dbm(-10.0, -10.0, 1e4, 300.0, -90.0, 1e4))
    check = check_phase_noise(arrays([floor + 6.0, floor + 12.0, floor + 2.0]), SETTINGS)
    assert check.flagged.tolist() == [True, False, True]
    # IIP3 error: half the correction of each product, averaged: lower 6 dB, upper 7 dB over the floor.
    size = [-10 * math.log10(1 - 10 ** (-m / 10)) / 2 for m in (6.0, 7.0)]
    assert check.error_db[0] == pytest.approx(sum(size) / 2, abs=1e-9)
    assert not np.isfinite(check.error_db[2])  # 2 dB over: only an upper bound, like noise
    flags = dict(check.flags)
    assert flags[2].error_db is None and "reciprocal-mixing" in flags[0].detail
    # The skirt (-70 dBm) is far over the thermal noise marker (-120 dBm): the result is flagged,
    # with the error the skirt may leave in the fitted point (12 and 13 dB over it).
    result = phase_noise_result(check, SETTINGS, np.zeros(3, bool), np.array([False, True, False]))
    assert len(result) == 1 and result[0].cause == "noise"
    assert result[0].error_db == pytest.approx(check.error_db[1])


def test_under_a_thermal_floor_the_result_is_not_the_phase_noises():
    floor = float(reciprocal_floor_dbm(-10.0, -10.0, 1e4, 300.0, -90.0, 1e4))
    check = check_phase_noise(arrays([floor + 6.0, floor + 30.0], noise_dbm=floor + 5.0), SETTINGS)
    assert check.flagged.tolist() == [True, False]
    assert phase_noise_result(check, SETTINGS, np.zeros(2, bool), np.array([False, True])) == []


def test_without_a_figure_nothing_is_checked():
    check = check_phase_noise(arrays([-200.0]), AnalysisSettings(spacing_hz=1e4))
    assert not check.flagged.any() and check.flags == ()
