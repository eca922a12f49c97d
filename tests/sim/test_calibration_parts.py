"""The simulated bench's calibration parts: the power meter at the DUT input plane and the thru mode."""

from __future__ import annotations

import numpy as np
import pytest

from tonebench.sim.signal_chain import SimBench
from tonebench.sim.scenario import Scenario
from tonebench.units import db_sum

F1_HZ, F2_HZ = 2.449e9, 2.451e9
LOW_IM3_HZ = 2 * F1_HZ - F2_HZ


def bench_with(**tables) -> SimBench:
    return SimBench(Scenario.model_validate(tables))


def tone(bench: SimBench, index: int, freq_hz: float, power_dbm: float, rf_on: bool = True) -> None:
    bench.set_source(index, freq_hz=freq_hz, power_dbm=power_dbm, rf_on=rf_on)
    bench.settle_source(index)


def read(bench: SimBench, freq_hz: float, atten_db: float = 10.0, rbw_hz: float = 100.0) -> float:
    state = bench.analyzer
    state.continuous = False
    state.center_hz = state.marker_freq_hz = freq_hz
    state.span_hz, state.rbw_hz, state.atten_db = 10 * rbw_hz, rbw_hz, atten_db
    bench.sweep()
    return bench.marker_power_dbm()


def test_meter_reads_input_plane_power_with_its_accuracy_and_scatter():
    bench = bench_with(power_meter={"accuracy_db": 0.04, "reading_noise_db": 0.01})
    tone(bench, 1, F1_HZ, -3.0)
    bench.power_meter.freq_hz = F1_HZ
    readings = np.array([bench.measure_power() for _ in range(400)])
    true_dbm = -3.0 - bench.truth.true_loss_db("in1", F1_HZ)
    # Mean: truth plus the fixed accuracy offset; scatter: the 0.01 dB asked for (numpy mean/std).
    assert readings.mean() == pytest.approx(true_dbm + 0.04, abs=0.003)
    assert readings.std() == pytest.approx(0.01, rel=0.15)


def test_meter_sees_total_power_of_both_tones_and_takes_time():
    bench = bench_with(power_meter={"accuracy_db": 0.0, "reading_noise_db": 0.0, "sensor_slope_db_per_ghz": 0.0})
    tone(bench, 1, F1_HZ, -3.0)
    tone(bench, 2, F2_HZ, -5.0)
    before_s = bench.clock_s
    reading_dbm = bench.measure_power()
    assert bench.clock_s - before_s == pytest.approx(bench.scenario.power_meter.measure_time_s)
    truth = bench.truth
    # A broadband sensor adds powers: db_sum of the two tones at the plane (and its own floor).
    expected_dbm = db_sum(-3.0 - truth.true_loss_db("in1", F1_HZ), -5.0 - truth.true_loss_db("in2", F2_HZ),
                          bench.scenario.power_meter.noise_floor_dbm)
    assert reading_dbm == pytest.approx(expected_dbm, abs=1e-9)


def test_meter_told_the_wrong_frequency_reads_off_by_the_sensor_slope():
    bench = bench_with(power_meter={"accuracy_db": 0.0, "reading_noise_db": 0.0, "sensor_slope_db_per_ghz": 0.5})
    tone(bench, 1, 2.4e9, -3.0)
    bench.power_meter.freq_hz = 2.4e9
    right_dbm = bench.measure_power()
    bench.power_meter.freq_hz = 1.4e9
    assert bench.measure_power() - right_dbm == pytest.approx(0.5, abs=1e-9)


def test_meter_with_rf_off_reads_its_floor():
    bench = bench_with(power_meter={"accuracy_db": 0.0, "reading_noise_db": 0.0})
    assert bench.measure_power() == pytest.approx(bench.scenario.power_meter.noise_floor_dbm)


def test_thru_passes_the_input_plane_to_the_output_path():
    bench = bench_with(analyzer={"level_error_db": 0.0, "mixer_toi_dbm": 300.0}, thru=True)
    assert bench.thru
    tone(bench, 1, F1_HZ, -25.0)  # far below the DUT's compression, for the check with the DUT
    truth = bench.truth
    expected_dbm = -25.0 - truth.true_loss_db("in1", F1_HZ) - truth.true_loss_db("out", F1_HZ)
    assert read(bench, F1_HZ) == pytest.approx(expected_dbm, abs=0.02)
    bench.set_thru(False)  # the DUT back: its gain shows
    assert read(bench, F1_HZ) - expected_dbm == pytest.approx(truth.true_gain_db(F1_HZ), abs=0.3)


def test_thru_shows_the_sources_residual_im3():
    system_ip3_dbm = 30.0
    bench = bench_with(sources={"system_ip3_dbm": system_ip3_dbm},
                       analyzer={"level_error_db": 0.0, "mixer_toi_dbm": 300.0, "danl_dbm_per_hz": -170.0}, thru=True)
    truth = bench.truth
    tone_dbm = -5.0  # per tone at the DUT input plane
    tone(bench, 1, F1_HZ, tone_dbm + truth.true_loss_db("in1", F1_HZ))
    tone(bench, 2, F2_HZ, tone_dbm + truth.true_loss_db("in2", F2_HZ))
    im3_at_plane_dbm = read(bench, LOW_IM3_HZ) + truth.true_loss_db("out", LOW_IM3_HZ)
    # Design section 3 intercept formula at the input plane: Pim3 = 3 P - 2 IP3.
    assert im3_at_plane_dbm == pytest.approx(3 * tone_dbm - 2 * system_ip3_dbm, abs=0.1)
    # The thru adds nothing of its own: with clean sources there is only noise there.
    clean = bench_with(sources={"system_ip3_dbm": 300.0},
                       analyzer={"level_error_db": 0.0, "mixer_toi_dbm": 300.0, "danl_dbm_per_hz": -170.0}, thru=True)
    tone(clean, 1, F1_HZ, tone_dbm + truth.true_loss_db("in1", F1_HZ))
    tone(clean, 2, F2_HZ, tone_dbm + truth.true_loss_db("in2", F2_HZ))
    assert read(clean, LOW_IM3_HZ) < 3 * tone_dbm - 2 * system_ip3_dbm - 30.0
