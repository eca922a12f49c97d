"""Transconductance coefficients, predicted IIP3, sweet spot and window (analysis/transconductance).

References from outside the code under test:
- sympy's exact derivatives of an EKV-like transfer curve, Id = I0 ln(1 + exp((V - Vt)/(2 n Ut)))^2
  (the EKV model's interpolation between weak and strong inversion, Enz-Krummenacher-Vittoz 1995;
  the form is from memory), and sympy's nsolve for the zero of its third derivative;
- the textbook two-tone result A_IP3^2 = (4/3)|a1/a3| (Razavi, RF Microelectronics, ch. 2; from
  memory), and independently a two-tone time-domain simulation through the cubic with an FFT;
- Monte Carlo with a fixed seed for the noise uncertainty.
"""

from __future__ import annotations

import numpy as np
import pytest

sp = pytest.importorskip("sympy")

from tonebench.analysis.transconductance import (  # noqa: E402
    capped_iip3_dbm,
    iip3_window,
    method_error_bound,
    predicted_iip3_dbm,
    predicted_iip3_w,
    sweet_spots,
    transconductance,
)
from tonebench.errors import InputError  # noqa: E402

I0_A, VT_V, N_SLOPE, UT_V = 1e-3, 0.5, 1.3, 0.02585
STEP_V = 0.005
WINDOW, POLYORDER = 11, 5
GATE_V = np.round(np.arange(0.0, 1.2 + STEP_V / 2, STEP_V), 12)

V = sp.symbols("V", real=True)
_R = sp.Rational  # exact constants, so nsolve's tolerance check is not defeated by float rounding
EKV_ID = _R(str(I0_A)) * sp.log(1 + sp.exp((V - _R(str(VT_V))) / (2 * _R(str(N_SLOPE)) * _R(str(UT_V))))) ** 2


def _ekv(expr_order: int):
    return sp.lambdify(V, sp.diff(EKV_ID, V, expr_order), "numpy")


def _max_on_windows(fn, centres, half_span):
    # max |f| over each window, sampled finely (20 points per step) so the bound is not undersold
    offsets = np.linspace(-half_span, half_span, 20 * WINDOW + 1)
    return np.array([np.max(np.abs(fn(c + offsets))) for c in centres])


@pytest.mark.parametrize("k", [1, 2, 3])
def test_derivatives_match_sympy_within_the_method_error_bound(k):
    drain_a = _ekv(0)(GATE_V)
    result = transconductance(GATE_V, drain_a, sigma_a=0.0, window_points=WINDOW, polyorder=POLYORDER)
    got = {1: result.g1, 2: result.g2, 3: result.g3}[k]
    exact = _ekv(k)(result.gate_v) / {1: 1, 2: 2, 3: 6}[k]
    m0, factor = method_error_bound(WINDOW, POLYORDER, k, STEP_V)
    higher = _max_on_windows(_ekv(m0), result.gate_v, (WINDOW // 2) * STEP_V)
    bound = factor * higher / {1: 1, 2: 2, 3: 6}[k]
    err = np.abs(got - exact)
    assert np.all(err <= bound * (1 + 1e-9) + 1e-15)
    # and the bound is not vacuous: the result is a usable derivative where g_k is sizeable
    big = np.abs(exact) > 0.1 * np.max(np.abs(exact))
    assert np.median(err[big] / np.abs(exact[big])) < 0.05


def test_result_states_method_window_step_and_leaves_out_the_ends():
    result = transconductance(GATE_V, _ekv(0)(GATE_V), sigma_a=1e-9)
    assert "savitzky-golay" in result.method
    assert result.window_points == 11 and result.polyorder == 5
    assert result.step_v == pytest.approx(STEP_V)
    assert result.gate_v[0] == pytest.approx(GATE_V[5]) and result.gate_v[-1] == pytest.approx(GATE_V[-6])


def test_noise_uncertainty_matches_monte_carlo():
    sigma_a = 1e-7
    clean = _ekv(0)(GATE_V)
    rng = np.random.default_rng(20261202)
    draws = {1: [], 2: [], 3: []}
    for _ in range(1000):
        r = transconductance(GATE_V, clean + rng.normal(0.0, sigma_a, clean.size), sigma_a)
        draws[1].append(r.g1)
        draws[2].append(r.g2)
        draws[3].append(r.g3)
    stated = {1: r.sigma_g1, 2: r.sigma_g2, 3: r.sigma_g3}
    for k in (1, 2, 3):
        empirical = np.std(np.array(draws[k]), axis=0, ddof=1)
        assert np.all(np.abs(empirical / stated[k] - 1) < 0.10), k


def test_cubic_gives_the_textbook_iip3():
    g1, g2, g3 = 0.05, 0.01, -0.02  # A/V, A/V^2, A/V^3
    gate_v = np.round(np.arange(-0.1, 0.1 + 1e-9, 0.005), 12)
    drain_a = 0.01 + g1 * gate_v + g2 * gate_v**2 + g3 * gate_v**3
    r = transconductance(gate_v, drain_a, sigma_a=0.0)
    at0 = int(np.argmin(np.abs(r.gate_v)))
    assert r.g1[at0] == pytest.approx(g1, rel=1e-9) and r.g3[at0] == pytest.approx(g3, rel=1e-6)
    # textbook: A_IP3^2 = (4/3)|a1/a3|; matched 50 ohm gate, P = A^2 / (2 R)
    a_ip3_sq = 4.0 / 3.0 * abs(g1 / g3)
    textbook_w = a_ip3_sq / (2 * 50.0)
    assert predicted_iip3_w(r.g1[at0], r.g3[at0]) == pytest.approx(textbook_w, rel=1e-6)
    assert predicted_iip3_dbm(g1, g3) == pytest.approx(10 * np.log10(textbook_w / 1e-3), abs=1e-9)


def test_cubic_intercept_agrees_with_a_two_tone_simulation():
    # independent of the formula: two tones through i = g1 v + g3 v^3, products read by FFT
    g1, g3 = 0.05, -0.02
    n, f1, f2 = 4096, 100, 110
    t = np.arange(n) / n
    amp_v = 0.01
    v = amp_v * (np.cos(2 * np.pi * f1 * t) + np.cos(2 * np.pi * f2 * t))
    spectrum = np.abs(np.fft.rfft(g1 * v + g3 * v**3)) * 2 / n
    fund, im3 = spectrum[f1], spectrum[2 * f1 - f2]
    # intercept amplitude: fundamental grows as A, IM3 as A^3: A_IP3 = A sqrt(fund / im3)
    a_ip3 = amp_v * np.sqrt(fund / im3)
    sim_w = a_ip3**2 / (2 * 50.0)
    assert predicted_iip3_w(g1, g3) == pytest.approx(sim_w, rel=1e-3)


def test_sweet_spot_on_the_ekv_g3_zero_within_1_mv():
    exact = float(sp.nsolve(sp.diff(EKV_ID, V, 3) / I0_A, V, (0.68, 0.74), solver="bisect"))
    r = transconductance(GATE_V, _ekv(0)(GATE_V), sigma_a=1e-9)
    spots = sweet_spots(r)
    assert spots is not None and len(spots) == 1
    assert abs(spots[0].gate_v - exact) < 1e-3
    assert spots[0].sigma_v == pytest.approx(r.sigma_g3 / abs(spots[0].slope_g3_per_v))


def test_no_sweet_spot_when_g3_keeps_its_sign():
    gate_v = np.round(np.arange(0.0, 0.4, STEP_V), 12)  # weak inversion only: g3 > 0
    assert sweet_spots(transconductance(gate_v, _ekv(0)(gate_v), sigma_a=0.0)) is None


def test_window_from_a_linear_g3():
    # Id = g1 V + g4 V^4: g3 = 4 g4 V, zero at 0; IIP3 = (2/3) g1' / (4 g4 |V| Rs)
    g1, g4 = 0.05, 0.5
    gate_v = np.round(np.arange(-0.2, 0.2 + 1e-9, 0.004) + 0.001, 12)  # zero between grid points
    r = transconductance(gate_v, g1 * gate_v + g4 * gate_v**4, sigma_a=0.0)
    spot = sweet_spots(r)[0]
    assert spot.gate_v == pytest.approx(0.0, abs=1e-9)
    threshold_dbm = 10.0
    window = iip3_window(r, spot.gate_v, threshold_dbm=threshold_dbm)
    # reference edges: (2/3) g1(V) / (4 g4 |V|) / 50 = P_th (10 dBm = 1/100 W), times |V|: a
    # cubic in V on each side, solved exactly by sympy (the root nearest the sweet spot)
    x = sp.symbols("x", real=True)
    g1_at = _R(1, 20) + 4 * _R(1, 2) * x**3
    side = [sp.Rational(2, 3) * g1_at - 4 * _R(1, 2) * s * x * 50 * _R(1, 100) for s in (1, -1)]
    hi = min(float(r) for r in sp.real_roots(sp.Poly(side[0], x)) if r > 0)
    lo = max(float(r) for r in sp.real_roots(sp.Poly(side[1], x)) if r < 0)
    # linear interpolation in dBm between 4 mV grid points: edges within a fraction of a step
    assert window.low_v == pytest.approx(lo, abs=1e-3)
    assert window.high_v == pytest.approx(hi, abs=1e-3)
    below = iip3_window(r, spot.gate_v, below_peak_db=6.0)
    assert below.threshold_dbm == pytest.approx(below.peak_dbm - 6.0)
    assert below.low_v < spot.gate_v < below.high_v


def test_cap_floors_g3_at_its_uncertainty():
    r = transconductance(GATE_V, _ekv(0)(GATE_V), sigma_a=1e-6)
    capped = capped_iip3_dbm(r)
    assert np.all(np.isfinite(capped))
    assert np.max(capped) <= predicted_iip3_dbm(np.max(np.abs(r.g1)), r.sigma_g3) + 1e-9


def test_unequal_steps_are_refused():
    gate_v = np.array([0.0, 0.1, 0.25, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0, 1.1])
    with pytest.raises(InputError):
        transconductance(gate_v, gate_v**2, sigma_a=0.0)


# --- degeneration what-if (analysis/degeneration), against a direct numerical series inversion ---

from tonebench.analysis.degeneration import (  # noqa: E402
    degenerate,
    degenerated_coefficients,
    inductor_ohm,
)


def _inverted_by_solving(g1, g2, g3, r_ohm):
    # solve i = g1 u + g2 u^2 + g3 u^3, u = v - R i, by Newton at small v; fit a polynomial in v
    from numpy.polynomial import polynomial as P

    v = np.linspace(-2e-3, 2e-3, 41)
    i = g1 * v / (1 + g1 * r_ohm)
    for _ in range(50):
        u = v - r_ohm * i
        resid = g1 * u + g2 * u**2 + g3 * u**3 - i
        i = i - resid / (-(g1 + 2 * g2 * u + 3 * g3 * u**2) * r_ohm - 1)
    return P.polyfit(v, i, 7)[1:4]


def _inverted_by_fixed_point(g1, g2, g3, z):
    # truncated power series (degree 3, complex coefficients): solve i = f(v - z i) for the
    # coefficients of i numerically (|g1 z| > 1 here, so plain iteration would diverge)
    from numpy.polynomial import polynomial as P
    from scipy.optimize import root

    def trunc(poly):  # keep the coefficients of v^0..v^3 (polymul may trim trailing zeros)
        return np.pad(poly, (0, 4))[:4]

    def residual(x):
        i = np.concatenate([[0.0], x[:3] + 1j * x[3:]])
        u = np.array([0, 1, 0, 0], dtype=complex) - z * i
        u2 = trunc(P.polymul(u, u))
        r = (g1 * u + g2 * u2 + g3 * trunc(P.polymul(u2, u)) - i)[1:]
        return np.concatenate([r.real, r.imag])

    x = root(residual, np.zeros(6), method="lm", options={"xtol": 1e-15, "ftol": 1e-15}).x
    return x[:3] + 1j * x[3:]


def test_resistor_degeneration_matches_solving_the_circuit():
    g1, g2, g3 = 0.08, 0.3, -0.5
    got = np.array(degenerated_coefficients(g1, g2, g3, 10.0)).real
    assert got == pytest.approx(_inverted_by_solving(g1, g2, g3, 10.0), rel=1e-5)


def test_complex_degeneration_matches_series_inversion():
    g1, g2, g3 = 0.08, 0.3, -0.5
    z = inductor_ohm(1e-9, 2.4e9) + 2.0  # about 15 ohm reactance plus 2 ohm
    got = np.array(degenerated_coefficients(g1, g2, g3, z))
    assert got == pytest.approx(_inverted_by_fixed_point(g1, g2, g3, z), rel=1e-9)


def test_degenerated_sweet_spot_moves_to_where_the_exact_g3_prime_is_zero():
    r_ohm = 5.0
    r = transconductance(GATE_V, _ekv(0)(GATE_V), sigma_a=0.0)
    pred = degenerate(r, r_ohm)
    # sympy reference: zero of g3 (1 + g1 R) - 2 g2^2 R from exact derivatives
    g1e, g2e, g3e = (sp.diff(EKV_ID, V, k) / sp.factorial(k) for k in (1, 2, 3))
    expr = (g3e * (1 + g1e * r_ohm) - 2 * g2e**2 * r_ohm) / I0_A
    sample = sp.lambdify(V, expr, "numpy")(r.gate_v)
    k = int(np.nonzero(sample[:-1] * sample[1:] < 0)[0][0])
    exact = float(sp.nsolve(expr, V, (r.gate_v[k], r.gate_v[k + 1]), solver="bisect"))
    assert pred.sweet_spot_v[0] == pytest.approx(exact, abs=1e-3)
    assert pred.shift_v[0] == pytest.approx(exact - sweet_spots(r)[0].gate_v, abs=1e-3)
    assert np.all(np.isfinite(pred.iip3_dbm[np.abs(pred.g3) > 0]))


def test_an_inductor_fills_the_null_in_rather_than_moving_it_to_the_sweep_end():
    """With a reactive Zs the quadrature term 2 g2^2 Zs is added where g3 vanishes: a small
    inductance leaves a dip at the undegenerated zero, a larger one none at all (the least |g3'|
    then sits at the sweep's end, where it is no sweet spot). The DC sweep is the simulated FET's;
    the reference its closed-form g1..g3 (sim/fet.py, checked against sympy in tests/sim)."""
    from tonebench.sim.fet import SimFet

    fet, gate_v = SimFet(), np.round(np.arange(0.40, 0.8005, 0.001), 6)
    series = [fet.series(float(v), 300.0) for v in gate_v]
    r = transconductance(gate_v, np.array([s.drain_a for s in series]), sigma_a=0.0, window_points=81)
    kept = np.isin(gate_v, r.gate_v)
    exact = [np.array([float(getattr(s, name)) for s in series])[kept] for name in ("g1_s", "g2_a_per_v2", "g3_a_per_v3")]
    for inductance_h, dips in ((1e-12, 1), (1e-9, 0)):
        z = inductor_ohm(inductance_h, 2.45e9)
        pred = degenerate(r, z)
        exact_g3 = np.abs(np.asarray(degenerated_coefficients(*exact, z)[2]))
        assert len(pred.sweet_spot_v) == dips, (inductance_h, pred.sweet_spot_v)
        if dips:
            assert pred.sweet_spot_v[0] == pytest.approx(fet.g3_zero_v(300.0), abs=2e-3)
            assert pred.sweet_spot_v[0] == pytest.approx(float(r.gate_v[np.argmin(exact_g3)]), abs=2e-3)
        else:  # the exact |g3'| has its least value at an end of the sweep: no interior null
            assert int(np.argmin(exact_g3)) in (0, exact_g3.size - 1)
