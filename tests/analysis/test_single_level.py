"""Results at one drive level and the reporting convention, on synthetic points of a memoryless
cubic whose two products have different intercepts (the simulator's DUT makes them equal).

Truth by hand: a cubic with input intercept IIP3 puts its IM3 at 3 Pin - 2 IIP3 at the input
plane, so IM3 re one tone = 2 (Pin - IIP3) dBc (textbook two-tone relation, from memory), and two
equal tones have a peak envelope power 4x one tone's (+6.02 dB)."""

import math

import numpy as np
import pytest

from tonebench.analysis.conventions import reported_intercepts
from tonebench.analysis.flags import ANALYZER_LIMITED, COMPRESSED, NOISE, SLOPE, Flag
from tonebench.analysis.single_level import level_results, pep_dbm
from tonebench.analysis.sweep_fit import fit_sweep

GAIN_DB = 15.0
IIP3_LOWER_DBM, IIP3_UPPER_DBM = 0.0, 2.0  # asymmetric products


def cubic_points(tone_dbm):
    """Arrays of a sweep (SweepData.arrays() names) of the asymmetric cubic, noise far below."""
    tone = np.asarray(tone_dbm, dtype=float)
    pout = tone + GAIN_DB
    return {"tone_dbm": tone, "pin1_dbm": tone, "pin2_dbm": tone, "pout_f1_dbm": pout, "pout_f2_dbm": pout,
            "im3_lower_dbm": 3 * tone - 2 * IIP3_LOWER_DBM + GAIN_DB,
            "im3_upper_dbm": 3 * tone - 2 * IIP3_UPPER_DBM + GAIN_DB,
            "noise_lower_dbm": np.full(tone.size, -160.0), "noise_upper_dbm": np.full(tone.size, -160.0),
            "overload": np.zeros(tone.size, bool)}


def test_one_level_gives_dbc_re_tone_and_pep_and_the_single_point_intercepts():
    a = cubic_points([-20.0])
    levels = level_results(a, [[]], level_accuracy_db=0.2)
    assert levels.im3_lower_dbc[0] == pytest.approx(2 * (-20.0 - IIP3_LOWER_DBM), abs=1e-9)
    assert levels.im3_upper_dbc[0] == pytest.approx(2 * (-20.0 - IIP3_UPPER_DBM), abs=1e-9)
    assert levels.im3_dbc[0] == pytest.approx(-40.0, abs=1e-9)  # the worse (higher) product
    # Two equal tones: PEP 4x one tone (20 log10 2 = 6.02 dB).
    assert levels.im3_lower_dbc_pep[0] == pytest.approx(levels.im3_lower_dbc[0] - 20 * math.log10(2), abs=1e-9)
    # IIP3 = Pin + delta/2, OIP3 = Pout + delta/2 (delta = -dBc).
    assert levels.iip3_lower_dbm[0] == pytest.approx(-20.0 + 40.0 / 2, abs=1e-9)
    assert levels.iip3_upper_dbm[0] == pytest.approx(-20.0 + 44.0 / 2, abs=1e-9)
    assert levels.oip3_upper_dbm[0] == pytest.approx(-5.0 + 44.0 / 2, abs=1e-9)
    assert levels.iip3_dbm[0] == pytest.approx(1.0, abs=1e-9)  # mean, the default
    assert levels.iip3_bound_db[0] == pytest.approx(0.1) and levels.im3_bound_db[0] == pytest.approx(0.2)


def test_pep_of_unequal_tones_is_the_sum_of_amplitudes():
    # 1 mW and 0.25 mW: amplitudes 1 and 0.5, PEP 2.25 mW.
    assert pep_dbm(0.0, 10 * math.log10(0.25)) == pytest.approx(10 * math.log10(2.25), abs=1e-12)


def test_point_bounds_follow_the_flags():
    a = cubic_points([-30.0, -20.0, -10.0, 0.0])
    flags = [[Flag(ANALYZER_LIMITED, NOISE, "noisy", 0.3)], [Flag(SLOPE, None, "top", None)],
             [Flag(COMPRESSED, None, "gain", 0.4)], [Flag(ANALYZER_LIMITED, NOISE, "buried", None)]]
    levels = level_results(a, flags, level_accuracy_db=0.2)
    np.testing.assert_allclose(levels.iip3_bound_db[:3], [0.1 + 0.3, 0.1, 0.1 + 0.4])
    np.testing.assert_allclose(levels.im3_bound_db[:3], [0.2 + 0.6, 0.2, 0.2])  # compression: no reading error
    assert np.isnan(levels.iip3_bound_db[3]) and np.isnan(levels.im3_bound_db[3])


def test_worse_convention_reports_the_lower_intercept_of_an_asymmetric_device():
    a = cubic_points(np.arange(-40.0, -19.0, 2.0))
    fit = fit_sweep(*(a[n] for n in ("tone_dbm", "pin1_dbm", "pin2_dbm", "pout_f1_dbm", "pout_f2_dbm",
                                     "im3_lower_dbm", "im3_upper_dbm", "noise_lower_dbm", "noise_upper_dbm",
                                     "overload")))
    assert fit.iip3_lower_dbm == pytest.approx(IIP3_LOWER_DBM) and fit.iip3_upper_dbm == pytest.approx(IIP3_UPPER_DBM)
    mean = reported_intercepts(fit.iip3_lower_dbm, fit.iip3_upper_dbm, fit.oip3_lower_dbm, fit.oip3_upper_dbm, "mean")
    worse = reported_intercepts(fit.iip3_lower_dbm, fit.iip3_upper_dbm, fit.oip3_lower_dbm, fit.oip3_upper_dbm, "worse")
    assert mean == pytest.approx((fit.iip3_dbm, fit.oip3_dbm))
    assert worse == pytest.approx((IIP3_LOWER_DBM, IIP3_LOWER_DBM + GAIN_DB))
    # The other side worse: the upper one is chosen, with its own OIP3.
    swapped = reported_intercepts(3.0, 1.0, 18.0, 16.5, "worse")
    assert swapped == pytest.approx((1.0, 16.5))
    per_point = level_results(a, [[] for _ in a["tone_dbm"]], 0.2, "worse")
    np.testing.assert_allclose(per_point.iip3_dbm, IIP3_LOWER_DBM, atol=1e-9)


def test_unknown_convention_is_refused():
    with pytest.raises(ValueError, match="allowed mean, worse"):
        reported_intercepts(0.0, 1.0, 15.0, 16.0, "best")
