"""The sweet spot in gate bias, predicted from a DC sweep and measured from two-tone points, on
data with a known answer: a parabola in the IM3 ratio (the window edges in closed form), and the
simulated TBF-77 FET (its closed-form g3 zero and window, sim/fet.py) read through the stage's
FFT-simulated two-tone lines with the readings' noise added."""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest

from tonebench.analysis.bias_search import (
    drive_points,
    input_offset_db,
    measured_sweet_spot,
    null_estimate_v,
    predicted_sweet_spot,
    refined_gates_v,
)
from tonebench.errors import InputError
from tonebench.run.bias_study import fine_plan_text
from tonebench.sim import physics
from tonebench.sim.fet_stage import FetStage, fet_of
from tonebench.sim.scenario import FetScenario

FET = fet_of(FetScenario())
DC_GATES_V = np.round(np.arange(0.40, 0.8005, 0.001), 6)


def row(gate_v, drive_dbm, ratio_db, noise_dbm=-200.0, gain_db=12.0, drain_a=6e-3):
    """A stored point stand-in: tones at the drive, IM3 ratio_db below the output tone."""
    pout = drive_dbm + gain_db
    return SimpleNamespace(status="measured", bias_v=gate_v, tone_dbm=drive_dbm, pin1_dbm=drive_dbm, pin2_dbm=drive_dbm,
                           pout_f1_dbm=pout, pout_f2_dbm=pout, im3_lower_dbm=pout + ratio_db,
                           im3_upper_dbm=pout + ratio_db, noise_lower_dbm=noise_dbm, noise_upper_dbm=noise_dbm,
                           drain_current_a=drain_a)


def fet_rows(gates_v, drive_dbm, input_gain=1.0, ratio_noise_db=0.0, seed=3, temp_k=300.0):
    """Two-tone points of the simulated stage (3 V drain), IM3 from its FFT lines."""
    rng = np.random.default_rng(seed)
    amp_v = math.sqrt(2 * 50 * 1e-3 * 10 ** (drive_dbm / 10))
    rows = []
    for gate_v in gates_v:
        stage = FetStage(FET, float(gate_v), 3.0, temp_k, input_gain, 50.0, 0.3)
        lines = physics.two_tone_products_v(stage, amp_v, amp_v)
        ratio_db = 20 * math.log10(abs(lines["im3_low"]) / abs(lines["f1"])) + rng.normal(0.0, ratio_noise_db)
        rows.append(row(float(gate_v), drive_dbm, ratio_db, gain_db=stage.gain_db(),
                        drain_a=float(FET.drain_a(gate_v, temp_k))))
    return rows


def test_the_parabola_fit_returns_the_closed_form_window():
    # r = s^2 (V - V0)^2 + c: IIP3 >= T where r <= 10^(-2 (T - P)/10), edges V0 +/- sqrt((rT - c)/s^2).
    s2, v0, c, drive = 1e-3, 0.5712, 1e-10, -30.0
    gates = np.round(v0 + 0.002 * np.arange(-4, 5) + 0.0003, 6)
    rows = [row(v, drive, 10 * math.log10(s2 * (v - v0) ** 2 + c)) for v in gates]
    found = measured_sweet_spot(drive_points(rows, drive), threshold_dbm=10.0)
    half_v = math.sqrt((10 ** (-2 * (10.0 - drive) / 10) - c) / s2)  # 3.1 mV
    assert found.sweet_spot_v == pytest.approx(v0, abs=1e-7)
    assert (found.window_low_v, found.window_high_v) == pytest.approx((v0 - half_v, v0 + half_v), abs=1e-7)
    assert found.peak_iip3_dbm == pytest.approx(max(drive - 10 * math.log10(s2 * (v - v0) ** 2 + c) / 2 for v in gates))


def test_predicted_from_a_noisy_dc_sweep_finds_the_fets_own_zero_and_window():
    rng = np.random.default_rng(5)
    drain_a = FET.drain_a(DC_GATES_V, 300.0) + rng.normal(0.0, 2e-7, DC_GATES_V.size)
    result, found = predicted_sweet_spot(DC_GATES_V, drain_a, 2e-7, 81, 5, threshold_dbm=15.0)
    zero_v = FET.g3_zero_v(300.0)  # 0.5698 V
    assert found.sweet_spot_v == pytest.approx(zero_v, abs=3 * found.sweet_spot_bound_v)
    assert found.sweet_spot_bound_v < 5e-3
    low_v, high_v = FET.iip3_window_v(15.0, 300.0)
    bound_v = 3 * found.window_bound_v
    assert found.window_low_v == pytest.approx(low_v, abs=bound_v) and found.window_high_v == pytest.approx(high_v, abs=bound_v)
    assert "81-point window" in found.method and "1 mV step" in found.method


def test_no_zero_in_the_sweep_is_said_not_invented():
    gates = np.round(np.arange(0.65, 0.80, 0.001), 6)  # all in compression: g3 < 0 throughout
    _, found = predicted_sweet_spot(gates, FET.drain_a(gates, 300.0), 0.0, 41, 5, threshold_dbm=15.0)
    assert found is None


@pytest.mark.parametrize("input_gain", [1.0, 1.4])
def test_measured_at_a_low_drive_finds_the_zero_and_the_input_offset(input_gain):
    gates = np.round(np.concatenate([np.arange(0.45, 0.74, 0.04), 0.570 + 0.002 * np.arange(-3, 4)]), 6)
    points = drive_points(fet_rows(gates, -35.0, input_gain, ratio_noise_db=0.05), -35.0)
    found = measured_sweet_spot(points, threshold_dbm=15.0)
    assert found.sweet_spot_v == pytest.approx(FET.g3_zero_v(300.0), abs=1e-3)
    assert found.gain_db == pytest.approx(FetStage(FET, found.sweet_spot_v, 3.0, 300.0, input_gain, 50.0, 0.3).gain_db(),
                                          abs=0.1)
    rng = np.random.default_rng(2)
    dc = FET.drain_a(DC_GATES_V, 300.0) + rng.normal(0.0, 2e-8, DC_GATES_V.size)
    result, _ = predicted_sweet_spot(DC_GATES_V, dc, 2e-8, 81, 5, threshold_dbm=15.0)
    # The match's voltage gain k lowers the DUT-input IIP3 by 20 log10 k (0 and 2.92 dB).
    assert input_offset_db(points, result) == pytest.approx(20 * math.log10(input_gain), abs=0.15)


def test_fine_steps_go_around_the_measured_peak_and_skip_what_was_measured():
    ratios = {0.45: -60.0, 0.49: -70.0, 0.53: -80.0, 0.57: -100.0, 0.61: -75.0}
    points = drive_points([row(v, -30.0, r) for v, r in ratios.items()], -30.0)
    assert refined_gates_v(points, 0.002, 5) == [0.566, 0.568, 0.572, 0.574]
    with pytest.raises(InputError, match="no measured point at the drive level -20 dBm"):
        drive_points([row(0.5, -30.0, -80.0)], -20.0)


def test_a_null_between_coarse_steps_is_placed_by_restoring_the_im3_sign():
    # Cold (253 K) the window is 8 mV wide and falls between two 40 mV steps; the highest IIP3 on
    # the coarse grid is then at its top end (strong inversion), not near the null.
    gates_v = np.round(np.arange(0.41, 0.7705, 0.04), 6)
    points = drive_points(fet_rows(gates_v, -30.0, ratio_noise_db=0.1, temp_k=253.15), -30.0)
    zero_v = FET.g3_zero_v(253.15)
    assert not any(abs(v - zero_v) < 0.01 for v in gates_v)
    assert abs(points.gate_v[np.argmin(points.ratio_db)] - zero_v) > 0.1
    assert null_estimate_v(points) == pytest.approx(zero_v, abs=3e-3)


def test_points_at_the_noise_floor_are_marked():
    points = drive_points([row(0.5, -30.0, -60.0, noise_dbm=-90.0), row(0.6, -30.0, -120.0, noise_dbm=-110.0)], -30.0)
    assert points.at_floor.tolist() == [False, True]


def test_the_fine_plan_keeps_everything_but_the_bias_tables():
    text = "[plan]\nname = \"x\"\n\n[bias]\ngate_start_v = 0.4\n\n[bias.dc]\ngate_step_v = 0.001\n\n[analyzer]\nrbw_hz = 30.0\n"
    fine = fine_plan_text(text, [0.566, 0.568], 3.0)
    assert "[bias.dc]" not in fine and "gate_start_v" not in fine and "[analyzer]\nrbw_hz = 30.0" in fine
    assert fine.endswith("[bias]\ngate_v = [0.566, 0.568]\ndrain_v = 3.0\n")
