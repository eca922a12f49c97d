"""Second order: the simulated DUT's f2-f1 and f1+f2 products against the closed form, and the
IIP2 fit with slope 2 on closed-form data and on the simulated bench.

Closed form (trigonometric identity, computed here): for y = a1 x + a2 x^2 + a3 x^3 and
x = A1 cos(w1 t) + A2 cos(w2 t), x^2 holds 2 A1 A2 cos(w1 t) cos(w2 t) = A1 A2 [cos((w2-w1) t) +
cos((w1+w2) t)], so each second-order product has amplitude a2 A1 A2, and the cubic part is untouched.
"""

import numpy as np
import pytest
from fifty_ohm import dbm_to_volts, volts_to_dbm
from simsweep import measure_sweep

from tonebench.analysis import (
    AnalysisSettings,
    assess_sweep,
    fit_second_order,
    point_iip2_dbm,
)
from tonebench.sim import physics
from tonebench.sim.scenario import Scenario


@pytest.mark.parametrize("p1_dbm, p2_dbm", [(-40.0, -40.0), (-30.0, -33.0), (-55.0, -50.0)])
def test_sim_second_order_products_match_closed_form(p1_dbm, p2_dbm):
    gain_db, iip3_dbm, iip2_dbm = 15.0, -2.0, 20.0
    model = physics.dut_nonlinearity(gain_db, iip3_dbm, None, iip2_dbm)
    amp1, amp2 = float(dbm_to_volts(p1_dbm)), float(dbm_to_volts(p2_dbm))
    out = physics.two_tone_products_v(model, amp1, amp2)
    a1 = 10 ** (gain_db / 20)
    a2 = a1 / float(dbm_to_volts(iip2_dbm))  # intercept: a1 A = a2 A^2
    for name in ("f2_minus_f1", "f1_plus_f2"):
        assert abs(out[name]) == pytest.approx(a2 * amp1 * amp2, rel=1e-9)
    # The second-order term leaves the odd products exactly as they were.
    odd = physics.two_tone_products_v(physics.dut_nonlinearity(gain_db, iip3_dbm), amp1, amp2)
    for name in ("f1", "f2", "im3_low", "im3_high"):
        assert out[name] == pytest.approx(odd[name], rel=1e-9, abs=1e-15)
    # And the intercept it was built for: IM2 out = P1 + P2 - IIP2 + G (dB form of a2 A1 A2).
    assert volts_to_dbm(out["f1_plus_f2"]) == pytest.approx(p1_dbm + p2_dbm - iip2_dbm + gain_db, abs=1e-6)


def test_default_scenario_second_order_is_far_down():
    # The default IIP2 keeps the products 100+ dB under the tones at the demo's top drive.
    model = physics.dut_nonlinearity(15.0, -2.0, 10.0, Scenario().dut.iip2_dbm)
    amp = float(dbm_to_volts(-8.0))
    out = physics.two_tone_products_v(model, amp, amp)
    assert volts_to_dbm(out["f1"]) - volts_to_dbm(out["f1_plus_f2"]) > 60.0


def test_point_iip2_equal_tones_textbook():
    # Equal tones: IIP2 = 2 Pin - Pim2 + G, i.e. OIP2 = 2 Pout - Pim2 (dB form of a1 A = a2 A^2).
    assert point_iip2_dbm(-30.0, -30.0, 20.0, -60.0) == pytest.approx(2 * -30.0 + 60.0 + 20.0)


def test_fit_second_order_closed_form_with_noise():
    rng = np.random.default_rng(3)
    tone = np.arange(-50.0, -20.0, 2.0)
    gain, iip2 = 12.0, 25.0
    im2 = 2 * tone - iip2 + gain  # P1 + P2 - IIP2 + G with equal tones
    noise = np.full(tone.size, -120.0)
    # What the analyzer reads: the product plus its noise, in power, with a little scatter.
    read = 10 * np.log10(10 ** (im2 / 10) + 10 ** (noise / 10)) + rng.normal(0, 0.05, tone.size)
    usable = np.ones(tone.size, bool)
    r = fit_second_order(tone, tone, np.full(tone.size, gain), usable, {"diff": (read, noise), "sum": (read, noise)},
                         level_accuracy_db=0.2, compression_db=np.zeros(tone.size), small_signal_gain_db=gain)
    assert r.iip2_dbm == pytest.approx(iip2, abs=0.1)
    assert r.oip2_dbm == pytest.approx(iip2 + gain, abs=0.1)
    assert r.slope_im2 == pytest.approx(2.0, abs=0.05)
    assert abs(r.iip2_dbm - iip2) <= r.bound_db
    # Points under 10 dB of the floor are left out: im2 - noise >= 10 dB.
    assert r.per_product["diff"]["n_valid"] == int(np.sum(read - noise >= 10.0))


def test_fit_second_order_refuses_with_reason():
    tone = np.arange(-50.0, -44.0, 2.0)
    noise = np.full(tone.size, -60.0)
    r = fit_second_order(tone, tone, np.full(tone.size, 10.0), np.ones(tone.size, bool),
                         {"diff": (noise + 2.0, noise)}, 0.2, np.zeros(tone.size), 10.0)
    assert r.iip2_dbm is None and "diff product: only 0 points" in r.reason


def test_iip2_measured_on_simulated_bench():
    scenario = Scenario(seed=5, dut={"iip2_dbm": 22.0, "p1db_dbm": -12.0})
    data = measure_sweep(scenario, 2.45e9, 1e6, np.arange(-40.0, -19.0, 2.0), second_order=True)
    a = assess_sweep(data, AnalysisSettings(mixer_toi_dbm=15.0, max_mixer_dbm=-10.0))
    second = a.second_order
    assert second is not None and second.iip2_dbm is not None
    assert set(second.per_product) == {"diff", "sum"}
    assert abs(second.iip2_dbm - 22.0) <= second.bound_db
    assert second.iip2_dbm == pytest.approx(22.0, abs=0.3)
    assert second.slope_im2 == pytest.approx(2.0, abs=0.1)
