"""The named steps of assess_sweep, each on its own, against closed forms worked out here.

Outside sources of the formulas (all textbook, cited from memory): power addition of uncorrelated
signals, P = 10 log10(sum 10^(Pi/10)) dBm; the two-tone third-order products of a memoryless
cubic, lower 2 P1 + P2 - 2 IIP3 and upper P1 + 2 P2 - 2 IIP3 at the input (Pozar, Microwave
Engineering, the intermodulation section); the triangle inequality for two coherent phasors,
|a| (1 - k) <= |a + b| <= |a| (1 + k) with k = |b|/|a|; the Student t quantile t(0.975, 2) = 4.303.
"""

import math

import numpy as np
import pytest

from tonebench.analysis import flags as fl
from tonebench.analysis.assess import SweepData, merged_point_flags
from tonebench.analysis.bound import compression_shift_db, iip3_at_least_dbm, iip3_bound_db, noise_term_db
from tonebench.analysis.sweep_fit import free_iip3_dbm
from tonebench.analysis.flags import Flag, StepJudgement
from tonebench.analysis.intercepts import input_intercepts_dbm, point_intercepts
from tonebench.analysis.point_checks import check_imbalance, check_noise, check_overload
from tonebench.analysis.region import check_compression
from tonebench.analysis.result_flags import refusal_results
from tonebench.analysis.settings import AnalysisSettings
from tonebench.analysis.system_checks import analyzer_share, check_source_intermod, effective_mixer_toi_dbm


def arrays(n=1, **given):
    """A sweep's arrays: every required reading NaN unless given (a scalar or one value per point)."""
    required = {name: np.full(n, np.nan) for name in (
        "tone_dbm", "pin1_dbm", "pin2_dbm", "pout_f1_dbm", "pout_f2_dbm", "im3_lower_dbm",
        "im3_upper_dbm", "noise_lower_dbm", "noise_upper_dbm")}
    required["tone_dbm"] = np.zeros(n)
    required["overload"] = np.zeros(n, bool)
    return SweepData(**{**required, **given}).arrays()


def power_sum_dbm(*levels_dbm):
    return 10.0 * math.log10(sum(10.0 ** (p / 10.0) for p in levels_dbm))


def noise_error(snr_db):
    # The noise correction's own size, halved for IIP3 (analysis.flags.noise_error_db's rule).
    return -10.0 * math.log10(1.0 - 10.0 ** (-snr_db / 10.0)) / 2.0


def coherent_error(ratio_db):
    # The larger side of the triangle inequality, halved for IIP3.
    return -20.0 * math.log10(1.0 - 10.0 ** (-ratio_db / 20.0)) / 2.0


def test_noise_step_corrects_in_power_and_flags_within_10_db():
    a = arrays(3, im3_lower_dbm=[-70.0, -60.0, -70.0], noise_lower_dbm=[-75.0, -90.0, -72.0],
               im3_upper_dbm=[-60.0, -60.0, -60.0], noise_upper_dbm=[-90.0, -90.0, -90.0])
    noise = check_noise(a)
    # 5 dB over: the noise power is subtracted; 30 dB over (>= 20 dB): the reading is kept.
    assert noise.lower_dbm[0] == pytest.approx(10.0 * math.log10(10.0 ** -7.0 - 10.0 ** -7.5), abs=1e-9)
    assert noise.upper_dbm[0] == -60.0
    assert noise.noisy.tolist() == [True, False, True]
    assert noise.error_db[0] == pytest.approx((noise_error(5.0) + noise_error(30.0)) / 2.0, abs=1e-12)
    assert [i for i, _ in noise.flags] == [0, 2]
    first, last = noise.flags[0][1], noise.flags[1][1]
    assert (first.flag, first.cause) == (fl.ANALYZER_LIMITED, fl.NOISE)
    assert first.error_db == pytest.approx(noise.error_db[0])
    # 2 dB over the floor: only an upper bound, no finite error.
    assert last.error_db is None and "only an upper bound" in last.detail


def test_overload_step_uses_the_mixer_level_of_both_tones():
    a = arrays(3, raw_f1_dbm=[-5.0, -20.0, -20.0], raw_f2_dbm=[-5.0, -20.0, -20.0], atten_db=10.0,
               overload=[False, False, True])
    check = check_overload(a, max_mixer_dbm=-13.0)
    # Two equal tones add 3.01 dB; the attenuator takes 10 dB off before the mixer.
    assert check.mixer_dbm[0] == pytest.approx(power_sum_dbm(-5.0, -5.0) - 10.0, abs=1e-12)
    assert check.over.tolist() == [True, False, True]
    assert [(i, f.cause) for i, f in check.flags] == [(0, fl.OVERLOAD), (2, fl.OVERLOAD)]
    assert "mixer level -12.0 dBm" in check.flags[0][1].detail
    assert check.flags[1][1].detail == "the analyzer reported overload"
    assert check_overload(a, max_mixer_dbm=None).over.tolist() == [False, False, True]


def test_imbalance_step_flags_beyond_half_a_db_with_a_quarter_of_it_as_error():
    check = check_imbalance(arrays(2, pin1_dbm=[-20.0, -20.0], pin2_dbm=[-20.8, -20.4]))
    assert check.unbalanced.tolist() == [True, False]
    (i, flag), = check.flags
    assert i == 0 and flag.flag == fl.TONE_IMBALANCE and flag.error_db == pytest.approx(0.8 / 4.0)


def test_source_step_carries_the_residual_through_the_gain():
    # Tones -20 dBm, system IIP3 20 dBm: residual at the input 3(-20) - 2(20) = -100 dBm, -90 at the
    # output through 10 dB; the DUT's products read 10 and 30 dB above that.
    a = arrays(1, pin1_dbm=-20.0, pin2_dbm=-20.0)
    lower, upper, gain = np.array([-80.0]), np.array([-60.0]), np.array([10.0])
    check = check_source_intermod(a, AnalysisSettings(system_ip3_dbm=20.0), lower, upper, gain)
    assert check.flagged.tolist() == [True] and check.notes == ()
    expected = (coherent_error(10.0) + coherent_error(30.0)) / 2.0
    assert check.error_db[0] == pytest.approx(expected, abs=1e-12)
    (_, flag), = check.flags
    assert flag.flag == fl.SOURCE_INTERMOD_LIMITED and "IM3 only 10.0 dB over" in flag.detail
    skipped = check_source_intermod(a, AnalysisSettings(system_note="no thru run"), lower, upper, gain)
    assert skipped.notes == ("source intermod not checked: no thru run",) and skipped.flags == ()
    assert skipped.error_db.tolist() == [0.0]


def no_step(n):
    nan = np.full(n, np.nan)
    return StepJudgement(nan, nan, np.zeros(n, bool), np.zeros(n, bool), nan)


def test_distortion_prediction_from_the_mixer_toi():
    # Tones -10 dBm at the analyzer input, 10 dB attenuation, mixer TOI 15 dBm: its own lower
    # product is 3(-10) - 2(15 + 10) = -80 dBm; the readings are 10 and 40 dB above it.
    a = arrays(2, raw_f1_dbm=-10.0, raw_f2_dbm=-10.0, atten_db=10.0, raw_lower_dbm=[-70.0, -40.0],
               raw_upper_dbm=[-70.0, -40.0], raw_noise_lower_dbm=-150.0, raw_noise_upper_dbm=-150.0)
    judged = {"lower": no_step(2), "upper": no_step(2)}
    share = analyzer_share(a, judged, 15.0, noisy=np.zeros(2, bool))
    assert share.ratio_db["lower"] == pytest.approx([10.0, 40.0], abs=1e-9)
    assert share.flagged.tolist() == [True, False]
    assert share.error_db == pytest.approx([coherent_error(10.0), coherent_error(40.0)], abs=1e-9)
    # A point buried in noise is not judged by the prediction.
    assert analyzer_share(a, judged, 15.0, noisy=np.array([True, False])).flagged.tolist() == [False, False]


def test_effective_toi_is_the_lower_of_declared_and_step_revealed():
    # The step revealed an analyzer product of -80 dBm with tones -10 dBm at 10 dB: by the inverse
    # of 2 P1 + P2 - 2 (TOI + A), TOI = (-30 + 80)/2 - 10 = 15 dBm.
    a = arrays(1, raw_f1_dbm=-10.0, raw_f2_dbm=-10.0, atten_db=10.0)
    made = StepJudgement(np.array([3.0]), np.array([1.2]), np.array([True]), np.array([True]), np.array([-80.0]))
    judged = {"lower": made, "upper": no_step(1)}
    assert effective_mixer_toi_dbm(a, judged, 20.0) == pytest.approx((15.0, 15.0))
    assert effective_mixer_toi_dbm(a, judged, 10.0) == pytest.approx((15.0, 10.0))
    assert effective_mixer_toi_dbm(a, {"lower": no_step(1), "upper": no_step(1)}, None) == (None, None)


def test_compression_step():
    check = check_compression(np.array([15.0, 14.5, 15.4]), 15.0, over=np.zeros(3, bool))
    assert check.compression_db == pytest.approx([0.0, 0.5, 0.0])
    assert [(i, f.error_db) for i, f in check.flags] == [(1, pytest.approx(0.25)), (2, pytest.approx(0.2))]
    assert "below" in check.flags[0][1].detail and check.flags[1][1].detail.endswith(": expansion")
    # An overloaded point's gain says nothing of the DUT; without a small-signal gain nothing is known.
    assert check_compression(np.array([15.0, 14.5, 15.4]), 15.0, np.array([False, True, False])).flags[0][0] == 2
    none = check_compression(np.array([15.0, 14.5]), None, np.zeros(2, bool))
    assert none.compression_db.tolist() == [0.0, 0.0] and none.flags == ()


def test_bound_terms():
    valid = np.ones(4, bool)
    # Mean compression 0.15 dB; leaving out the more compressed half moves the mean 2.5 -> 1.5.
    assert compression_shift_db([1.0, 2.0, 3.0, 4.0], [0.0, 0.1, 0.2, 0.3], valid) == pytest.approx(1.0)
    assert compression_shift_db([1.0, 2.0, 3.0], [0.0, 0.1, 0.2], np.ones(3, bool)) == pytest.approx(0.1)
    assert compression_shift_db([1.0], [0.5], np.zeros(1, bool)) == 0.0
    # Independent per-point errors add in quadrature and the mean of n divides by n: 0.5 / 2.
    assert noise_term_db(np.array([0.3, 0.4, 9.0]), np.array([True, True, False])) == pytest.approx(0.25)
    # Systematic terms add, the random ones (scatter, noise) root-sum-square: 0.3 + 0.5.
    assert iip3_bound_db({"level": 0.1, "source": 0.2, "scatter": 0.3, "noise": 0.4}) == pytest.approx(0.8)
    assert iip3_bound_db({"level": 0.1, "source": math.inf}) is None
    assert iip3_bound_db({}) is None


def test_lower_bound_from_readings_with_noise_in_them():
    # Gain 10 dB; tones -30 dBm with IM3 -90 at the output (IIP3 (3(-30) + 100)/2 = 5 dBm) and
    # tones -20 with IM3 -70 (IIP3 (3(-20) + 80)/2 = 10 dBm).
    a = arrays(2, pin1_dbm=[-30.0, -20.0], pin2_dbm=[-30.0, -20.0], pout_f1_dbm=[-20.0, -10.0],
               pout_f2_dbm=[-20.0, -10.0], im3_lower_dbm=[-90.0, -70.0], im3_upper_dbm=[-90.0, -70.0])
    gain = np.array([10.0, 10.0])
    assert iip3_at_least_dbm(a, np.zeros(2, bool), gain, 10.0, 0.2) == pytest.approx(9.9)
    assert iip3_at_least_dbm(a, np.array([False, True]), gain, 10.0, 0.2) == pytest.approx(4.9)
    # A point off the small-signal gain proves nothing.
    assert iip3_at_least_dbm(a, np.array([True, False]), np.array([10.0, 9.0]), 10.0, 0.2) is None


def test_refusal_results_count_each_cause():
    out = refusal_results(np.array([True, True, False]), np.array([False, False, True]),
                          np.array([0.0, 0.0, 0.0]), at_least_dbm=9.9)
    assert [f.detail for f in out] == [
        "intercept refused: 2 of 3 points IM3 within 10 dB of the noise floor; the readings still prove IIP3 >= 9.90 dBm",
        "intercept refused: 1 of 3 points overloaded"]
    compressed = refusal_results(np.zeros(2, bool), np.zeros(2, bool), np.array([0.5, 0.1]), None)
    assert [(f.flag, f.detail) for f in compressed] == [(fl.COMPRESSED, "intercept refused: 1 of 2 points compressed")]


def test_free_slope_lines_meet_where_closed_form_says():
    # Fundamental x + 10, IM3 3x - 30: they meet at x = (10 + 30)/(3 - 1) = 20 dBm.
    x = np.array([-30.0, -25.0, -20.0])
    valid = np.ones(3, bool)
    assert free_iip3_dbm(x, valid, x + 10.0, 3.0 * x - 30.0, 3.0 * x - 30.0, True) == pytest.approx(20.0)
    # An IM3 line shallower than the fundamental never meets it from below.
    assert free_iip3_dbm(x, valid, x + 10.0, 0.5 * x - 30.0, 3.0 * x - 30.0, True) is None
    assert free_iip3_dbm(x, valid, x + 10.0, 3.0 * x - 30.0, 3.0 * x - 30.0, False) is None


def test_one_intercept_formula_for_dut_and_thru():
    # Unequal tones -10 and -11 dBm, IIP3 20 dBm: lower -20 - 11 - 40 = -71, upper -10 - 22 - 40 = -72.
    lower, upper = input_intercepts_dbm(-10.0, -11.0, -71.0, -72.0)
    assert (float(lower), float(upper)) == pytest.approx((20.0, 20.0))
    # Through a 12 dB gain the same products read 12 dB higher at the output: the same intercept.
    pts = point_intercepts(-10.0, -11.0, 2.0, 1.0, -59.0, -60.0)
    assert (float(pts.iip3_lower_dbm), float(pts.oip3_upper_dbm)) == pytest.approx((20.0, 32.0))


def test_point_flags_keep_the_order_of_the_steps():
    first, second = Flag("a", None, "", None), Flag("b", None, "", None)
    assert merged_point_flags(3, (((2, first),), ((0, second), (2, second)))) == [[second], [], [first, second]]
