"""The simulated FET against outside references. Truth of the default (invented TBF-77) at 300 K:
g3 zero 0.5698 V (Id 6.64 mA), IIP3 >= 15 dBm from 0.5642 to 0.5764 V (12.2 mV), drift -1.22 mV/K."""

import math

import numpy as np
import pytest

from tonebench.sim.fet import FetParameters, SimFet

FET = SimFet()
T_K = 300.0


@pytest.mark.parametrize("temp_k", [250.0, 300.0, 360.0])
@pytest.mark.parametrize("offset_v", [-0.2, -0.05, 0.0, 0.12, 0.6])
def test_closed_form_derivatives_match_sympy(temp_k, offset_v):
    sympy = pytest.importorskip("sympy")  # reference library: analytic derivatives of the composite
    p = FET.params
    v = sympy.Symbol("v")
    ut = sympy.Float(FET.thermal_voltage_v(temp_k), 30)
    x = (v - sympy.Float(FET.threshold_v(temp_k), 30)) / (2 * sympy.Float(p.n) * ut)
    s = sympy.log(1 + sympy.exp(x))
    drain = sympy.Float(FET.specific_current_a(temp_k), 30) * s**2 / (1 + sympy.Float(p.theta_per_v) * 2 * sympy.Float(p.n) * ut * s)
    gate_v = FET.threshold_v(temp_k) + offset_v
    ser = FET.series(gate_v, temp_k)
    ref = [float(sympy.diff(drain, v, k).subs(v, gate_v).evalf(30)) / math.factorial(k) for k in range(4)]
    got = [ser.drain_a, ser.g1_s, ser.g2_a_per_v2, ser.g3_a_per_v3]
    for r, g in zip(ref, got):
        assert float(g) == pytest.approx(r, rel=1e-9, abs=1e-300)


def test_g3_zero_is_a_root_with_sign_change():
    zero_v = FET.g3_zero_v(T_K)
    g3 = FET.series(np.array([zero_v - 1e-4, zero_v, zero_v + 1e-4]), T_K).g3_a_per_v3
    assert g3[0] > 0 > g3[2]
    assert abs(g3[1]) < 1e-9 * abs(g3[0] - g3[2])


@pytest.mark.parametrize("offset_v", [-0.08, 0.04, 0.2])
def test_fft_two_tone_iip3_matches_power_series(offset_v):
    # Textbook power series: A_IIP3^2 = (4/3)|g1/g3| (Razavi, RF Microelectronics, from memory).
    gate_v = FET.g3_zero_v(T_K) + offset_v
    ser = FET.series(gate_v, T_K)
    formula_db = 10 * math.log10(4 / 3 * abs(ser.g1_s / ser.g3_a_per_v3))
    fft_db = 20 * math.log10(FET.two_tone_drain(gate_v, 1e-3, T_K).iip3_amplitude_v)
    assert fft_db == pytest.approx(formula_db, abs=0.5)


def test_drift_equals_threshold_plus_thermal_voltage_term_without_theta():
    # theta = 0: the zero sits at a fixed x*, so Vz = Vt + 2 n Ut x* and dVz/dT = kVt + (Vz - Vt)/T.
    fet = SimFet(FetParameters(theta_per_v=0.0))
    zero_v = fet.g3_zero_v(T_K)
    expected = 1e3 * (fet.params.dvt_dt_v_per_k + (zero_v - fet.threshold_v(T_K)) / T_K)
    assert fet.g3_zero_drift_mv_per_k(T_K) == pytest.approx(expected, rel=1e-5)


def test_default_drift_sign_and_size_follow_threshold():
    drift = FET.g3_zero_drift_mv_per_k(T_K)
    assert -1.5 < drift < -1.0  # kVt -1.5 mV/K plus the Ut term (+0.1 to +0.5 mV/K)


def test_window_edges_sit_at_threshold():
    low_v, high_v = FET.iip3_window_v(15.0, T_K)
    assert low_v < FET.g3_zero_v(T_K) < high_v
    assert FET.iip3_dbm(low_v, T_K) == pytest.approx(15.0, abs=1e-6)
    assert 0.008 < high_v - low_v < 0.02
