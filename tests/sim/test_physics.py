"""Physics of the simulated bench checked against textbook formulas computed here, independently."""

import math

import numpy as np
import pytest

from tonebench.sim import physics
from tonebench.units import thermal_noise_dbm_per_hz

R_OHM = 50.0


def vpeak(power_dbm):
    # P = Vpeak^2 / (2 R), 50 ohm, powers in dBm (1 mW reference).
    return np.sqrt(2.0 * R_OHM * 1e-3 * 10.0 ** (np.asarray(power_dbm, dtype=float) / 10.0))


def dbm(vpeak_v):
    return 10.0 * np.log10(np.abs(vpeak_v) ** 2 / (2.0 * R_OHM) / 1e-3)


def cubic_coefficients(gain_db, iip3_dbm):
    # Power series y = a1 x + a3 x^3; intercept where A^2 = (4/3)|a1/a3| (Razavi, RF Microelectronics, from memory).
    a1 = 10.0 ** (gain_db / 20.0)
    a3 = -(4.0 / 3.0) * a1 / vpeak(iip3_dbm) ** 2
    return a1, a3


def test_coefficients_follow_gain_and_intercept():
    a1, a3 = cubic_coefficients(15.0, -2.0)
    model = physics.dut_nonlinearity(15.0, -2.0)
    assert model.a1 == pytest.approx(a1, rel=1e-12)
    assert model.a3 == pytest.approx(a3, rel=1e-12)
    assert model.sat_norm is None


@pytest.mark.parametrize("tone_dbm", [-40.0, -25.0, -18.0])
def test_fft_two_tone_matches_power_series_equal_tones(tone_dbm):
    # Equal tones A through y = a1 x + a3 x^3: IM3 = (3/4) a3 A^3 at 2f1-f2 and 2f2-f1,
    # fundamental = a1 A + (9/4) a3 A^3 (Razavi, RF Microelectronics, from memory).
    a1, a3 = cubic_coefficients(15.0, -2.0)
    model = physics.Nonlinearity(a1=a1, a3=a3, sat_norm=None)
    amp_v = float(vpeak(tone_dbm))
    out = physics.two_tone_products_v(model, amp_v, amp_v)
    im3_v = 0.75 * a3 * amp_v**3
    fundamental_v = a1 * amp_v + 2.25 * a3 * amp_v**3
    for name in ("im3_low", "im3_high"):
        assert out[name] == pytest.approx(im3_v, rel=1e-9, abs=1e-15)
    for name in ("f1", "f2"):
        assert out[name] == pytest.approx(fundamental_v, rel=1e-9)
    # Odd-order nonlinearity only: nothing at f2-f1 or f1+f2.
    assert abs(out["f2_minus_f1"]) < 1e-12 * abs(fundamental_v)
    assert abs(out["f1_plus_f2"]) < 1e-12 * abs(fundamental_v)


def test_fft_two_tone_matches_power_series_unequal_tones():
    # Cubic expansion of (A1 cos w1t + A2 cos w2t)^3: 2w1-w2 has (3/4) A1^2 A2, 2w2-w1 has (3/4) A1 A2^2,
    # w1 has (3/4) A1^3 + (3/2) A1 A2^2 (trigonometric identities; Razavi, from memory).
    a1, a3 = cubic_coefficients(10.0, 5.0)
    model = physics.Nonlinearity(a1=a1, a3=a3, sat_norm=None)
    amp1_v, amp2_v = float(vpeak(-20.0)), float(vpeak(-23.0))
    out = physics.two_tone_products_v(model, amp1_v, amp2_v)
    assert out["im3_low"] == pytest.approx(0.75 * a3 * amp1_v**2 * amp2_v, rel=1e-9)
    assert out["im3_high"] == pytest.approx(0.75 * a3 * amp1_v * amp2_v**2, rel=1e-9)
    assert out["f1"] == pytest.approx(a1 * amp1_v + a3 * (0.75 * amp1_v**3 + 1.5 * amp1_v * amp2_v**2), rel=1e-9)
    assert out["f2"] == pytest.approx(a1 * amp2_v + a3 * (0.75 * amp2_v**3 + 1.5 * amp2_v * amp1_v**2), rel=1e-9)


def test_pure_cubic_iip3_minus_p1db():
    # Single tone: gain a1 + (3/4) a3 A^2 drops 1 dB at A^2 = 0.145 |a1/a3|, so
    # IIP3 - P1dB = 10 log10((4/3) / 0.145) = 9.6 dB (Razavi, RF Microelectronics, from memory).
    expected_db = 10.0 * math.log10((4.0 / 3.0) / 0.145)
    for gain_db, iip3_dbm in ((15.0, -2.0), (0.0, 30.0), (25.0, -15.0)):
        model = physics.dut_nonlinearity(gain_db, iip3_dbm)
        assert iip3_dbm - physics.p1db_input_dbm(model) == pytest.approx(expected_db, abs=0.02)


@pytest.mark.parametrize("iip3_above_p1db_db", [10.0, 12.0, 16.0])
def test_saturation_sets_p1db_and_keeps_small_signal_a3(iip3_above_p1db_db):
    model = physics.dut_nonlinearity(15.0, -2.0, iip3_above_p1db_db)
    cubic = physics.dut_nonlinearity(15.0, -2.0)
    assert physics.p1db_input_dbm(model) == pytest.approx(-2.0 - iip3_above_p1db_db, abs=0.01)
    assert model.a1 == cubic.a1 and model.a3 == cubic.a3
    # Far below compression the IM3 is the cubic's own: a3 is unchanged.
    amp_v = float(vpeak(-45.0))
    ratio_db = dbm(physics.two_tone_products_v(model, amp_v, amp_v)["im3_low"]) - dbm(
        physics.two_tone_products_v(cubic, amp_v, amp_v)["im3_low"])
    assert abs(ratio_db) < 0.02


@pytest.mark.parametrize("iip3_above_p1db_db", [None, 12.0])
def test_output_saturates_far_above_p1db(iip3_above_p1db_db):
    model = physics.dut_nonlinearity(15.0, -2.0, iip3_above_p1db_db)
    in_dbm = np.arange(-30.0, 50.0, 1.0)
    out_dbm = np.array([dbm(physics.two_tone_products_v(model, a, a)["f1"]) for a in vpeak(in_dbm)])
    # No fold-back: once reached, the output never falls more than 0.05 dB below its running maximum,
    assert np.max(np.maximum.accumulate(out_dbm) - out_dbm) < 0.05
    # and 40 dB more drive changes the output by well under 1 dB (saturated).
    assert out_dbm[-1] - out_dbm[-41] < 1.0


def test_thermal_noise_at_290_kelvin():
    # kT with k = 1.380649e-23 J/K (SI definition, 2019), T = 290 K: -173.98 dBm/Hz.
    assert thermal_noise_dbm_per_hz() == pytest.approx(10 * math.log10(1.380649e-23 * 290 / 1e-3), abs=1e-9)
    assert thermal_noise_dbm_per_hz() == pytest.approx(-174.0, abs=0.05)


def test_small_signal_slopes_on_db_scale():
    # Design section 3: small-signal slopes 1 (fundamental) and 3 (IM3) on a dB scale.
    model = physics.dut_nonlinearity(15.0, -2.0)
    in_dbm = np.arange(-60.0, -30.0, 2.0)
    products = [physics.two_tone_products_v(model, a, a) for a in vpeak(in_dbm)]
    fundamental_slope = np.polyfit(in_dbm, [dbm(p["f1"]) for p in products], 1)[0]
    im3_slope = np.polyfit(in_dbm, [dbm(p["im3_high"]) for p in products], 1)[0]
    assert fundamental_slope == pytest.approx(1.0, abs=0.005)
    assert im3_slope == pytest.approx(3.0, abs=0.005)


def test_residual_im3_at_input_adds_as_phasor_through_dut():
    # A product r already at 2f1-f2 passes with gain a1 and adds to (3/4) a3 A^3 as complex numbers.
    a1, a3 = cubic_coefficients(15.0, -2.0)
    model = physics.Nonlinearity(a1=a1, a3=a3, sat_norm=None)
    amp_v = float(vpeak(-50.0))
    residual_v = 0.4 * abs(0.75 * a3 * amp_v**3) / a1 * np.exp(1j * 0.7)
    out = physics.two_tone_products_v(model, amp_v, amp_v, im3_low_in_v=residual_v)
    assert out["im3_low"] == pytest.approx(0.75 * a3 * amp_v**3 + a1 * residual_v, rel=1e-4)


def test_test_system_im3_levels():
    # Intercept formula for a third-order product: P_IM3 = 2 P1 + P2 - 2 IP3 (design section 3).
    assert physics.source_residual_im3_dbm(-10.0, -12.0, 40.0) == (-112.0, -114.0)
    # Analyzer: products at the mixer 2 Pm1 + Pm2 - 2 TOI with Pm = P - atten, referred back (+atten).
    lower_dbm, upper_dbm = physics.mixer_im3_dbm(-10.0, -10.0, 10.0, 15.0)
    assert lower_dbm == pytest.approx(3 * -20.0 - 30.0 + 10.0) and upper_dbm == lower_dbm


def test_gaussian_rbw_filter():
    # 3 dB bandwidth = RBW: half power at +/- RBW/2.
    assert 10 * np.log10(physics.rbw_power_response(500.0, 1000.0)) == pytest.approx(-10 * np.log10(2), abs=1e-9)
    # Noise bandwidth: integral of exp(-4 ln2 (f/RBW)^2) df = RBW sqrt(pi / (4 ln2)), about 1.065 RBW
    # (Gaussian integral); checked here by numerical integration.
    offsets_hz = np.linspace(-5000.0, 5000.0, 200001)
    integral_hz = np.trapezoid(physics.rbw_power_response(offsets_hz, 1000.0), offsets_hz)
    assert physics.noise_bandwidth_hz(1000.0) == pytest.approx(integral_hz, rel=1e-6)
    assert physics.noise_bandwidth_hz(1000.0) == pytest.approx(1065.0, rel=1e-3)


def test_sweep_time_formula():
    # Design section 5: k * span / RBW^2, bounded below.
    assert physics.sweep_time_s(1e4, 100.0, 2.5) == pytest.approx(2.5)
    assert physics.sweep_time_s(1e3, 1e5, 2.5) == physics.MIN_SWEEP_TIME_S


def test_trace_noise_fluctuation_follows_averages():
    rng = np.random.default_rng(3)
    freq_hz = np.linspace(0.0, 1.0e6, 20001)
    power_w = physics.trace_power_w(freq_hz, np.array([]), np.array([]), 1000.0, -150.0, 16, rng)
    mean_w = 1e-3 * 10 ** (-150.0 / 10) * physics.noise_bandwidth_hz(1000.0)
    # Gamma(k, 1/k): mean 1, relative spread 1/sqrt(k) (numpy Generator.gamma documentation).
    assert np.mean(power_w) / mean_w == pytest.approx(1.0, abs=0.01)
    assert np.std(power_w) / mean_w == pytest.approx(1.0 / 4.0, rel=0.03)
