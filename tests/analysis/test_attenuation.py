"""The analyzer's own IM3 and noise versus attenuation, and the attenuation the sequencer picks."""

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from tonebench.analysis import analyzer_im3_dbm, optimum_atten_db
from tonebench.analysis.attenuation import (
    DISTORTION_BELOW_NOISE_DB,
    OVERLOAD_MARGIN_DB,
    analyzer_noise_dbm,
    implied_mixer_toi_dbm,
)
from tonebench.sim import physics


def test_analyzer_im3_matches_the_simulator():
    # The simulator computes the mixer's products at the mixer and refers them back; the analysis
    # uses the input intercept TOI + A directly. Both must agree.
    for p1, p2, atten, toi in ((-10.0, -10.0, 10.0, 15.0), (-3.0, -5.0, 0.0, 8.0), (5.0, 4.0, 36.0, 20.0)):
        assert analyzer_im3_dbm(p1, p2, atten, toi) == pytest.approx(physics.mixer_im3_dbm(p1, p2, atten, toi))


@given(p1=st.floats(-80, 20), p2=st.floats(-80, 20), atten=st.floats(0, 70), toi=st.floats(-20, 40))
def test_implied_toi_inverts_the_prediction(p1, p2, atten, toi):
    lower, _ = analyzer_im3_dbm(p1, p2, atten, toi)
    assert implied_mixer_toi_dbm(p1, p2, atten, lower) == pytest.approx(toi, abs=1e-9)


def test_textbook_optimum_and_dynamic_range():
    # d = 0 is the textbook optimum: the analyzer's IM3 equals its noise floor. Worked example:
    # -10 dBm tones, TOI +15 dBm, DANL -150 dBm/Hz, RBW 1 kHz: N0 = -120 dBm, A = (-30 - 30 + 120)/3.
    choice = optimum_atten_db(-10.0, 15.0, -150.0, 1000.0, 0.0, 70.0, 1e-6, distortion_below_noise_db=0.0)
    assert choice.atten_db == pytest.approx(20.0, abs=1e-5)
    assert choice.analyzer_im3_dbm == pytest.approx(choice.noise_dbm, abs=1e-4)
    # The spurious-free dynamic range there is (2/3)(TOI - N0) (the classic formula, from memory).
    assert -10.0 - choice.noise_dbm == pytest.approx(2.0 / 3.0 * (15.0 - -120.0), abs=1e-4)


@given(tone=st.floats(-60, 10), toi=st.floats(0, 30), danl=st.floats(-165, -140), rbw=st.floats(10, 1e6))
def test_default_optimum_puts_distortion_under_noise(tone, toi, danl, rbw):
    choice = optimum_atten_db(tone, toi, danl, rbw, -1000.0, 1000.0, 1e-6)
    assert choice.limited_by == "optimum"
    assert choice.noise_dbm - choice.analyzer_im3_dbm == pytest.approx(DISTORTION_BELOW_NOISE_DB, abs=1e-4)
    # Independent of the code: noise DANL + 10log10(RBW) + A, IM3 3P - 2(TOI + A).
    a = choice.atten_db
    assert choice.noise_dbm == pytest.approx(danl + 10 * math.log10(rbw) + a)
    assert choice.analyzer_im3_dbm == pytest.approx(3 * tone - 2 * (toi + a))


def test_rounding_up_to_the_step_and_limits():
    exact = optimum_atten_db(-12.3, 15.0, -150.0, 1000.0, 0.0, 70.0, 1e-6).atten_db
    stepped = optimum_atten_db(-12.3, 15.0, -150.0, 1000.0, 0.0, 70.0, 2.0)
    assert stepped.atten_db % 2.0 == 0.0 and exact <= stepped.atten_db < exact + 2.0
    assert optimum_atten_db(-90.0, 15.0, -150.0, 1000.0, 0.0, 70.0, 2.0).limited_by == "min_atten"
    assert optimum_atten_db(-90.0, 15.0, -150.0, 1000.0, 0.0, 70.0, 2.0).atten_db == 0.0
    top = optimum_atten_db(35.0, 15.0, -150.0, 1000.0, 0.0, 70.0, 2.0)  # ideal 72 dB
    assert (top.atten_db, top.limited_by) == (70.0, "max_atten")


def test_overload_floor():
    # A very linear mixer would allow little attenuation; the mixer level still has to stay
    # OVERLOAD_MARGIN_DB under its limit with both tones (+3.01 dB) on it.
    choice = optimum_atten_db(5.0, 60.0, -150.0, 1000.0, 0.0, 70.0, 2.0, max_mixer_dbm=-10.0)
    assert choice.limited_by == "overload"
    total_dbm = 5.0 + 10 * np.log10(2.0)
    assert total_dbm - choice.atten_db <= -10.0 - OVERLOAD_MARGIN_DB
    assert total_dbm - (choice.atten_db - 2.0) > -10.0 - OVERLOAD_MARGIN_DB  # the least that does


def test_noise_floor_formula():
    # Design sec. 5: noise in the RBW is DANL(1 Hz) + 10 log10(RBW), rising dB for dB with A.
    assert analyzer_noise_dbm(-150.0, 1000.0, 10.0) == pytest.approx(-110.0)
