"""Detector-mode corrections of readings (analysis/detectors.py): the Rician log mean, its inverse,
and log-averaged sample readings made power readings. Sources beside each check."""

import numpy as np
import pytest

from tonebench.analysis import detectors
from tonebench.analysis.sweep_fit import noise_corrected_dbm


def test_noise_alone_reads_2_51_db_low_in_a_log_mean():
    # -10 log10(e) * Euler's gamma (from memory: mean of ln of an exponential variable is -gamma).
    assert detectors.LOG_SAMPLE_BIAS_DB == pytest.approx(-2.507, abs=0.001)
    assert detectors.rician_log_excess_db(0.0) == pytest.approx(-2.507, abs=0.001)


@pytest.mark.parametrize("k", [0.1, 1.0, 3.0, 10.0])
def test_rician_log_mean_matches_a_simulation(k):
    # E[10 log10 |a + n|^2] over 10 log10 of the noise power, K = |a|^2 / E|n|^2: a Monte Carlo check
    # of the closed form ln K + E1(K) (from memory), 400k samples (standard error ~0.01 dB).
    rng = np.random.default_rng(5)
    n = (rng.standard_normal(400_000) + 1j * rng.standard_normal(400_000)) / np.sqrt(2)
    simulated_db = float(np.mean(10 * np.log10(np.abs(np.sqrt(k) + n) ** 2)))
    assert detectors.rician_log_excess_db(k) == pytest.approx(simulated_db, abs=0.03)


def test_inverse_round_trips_and_clamps_at_noise():
    k = np.array([0.01, 0.5, 2.0, 30.0, 1e4])
    assert detectors.line_to_noise_from_log_mean(detectors.rician_log_excess_db(k)) == pytest.approx(k, rel=1e-6)
    assert detectors.line_to_noise_from_log_mean(np.array([-4.0, np.nan]))[0] == 0.0
    assert np.isnan(detectors.line_to_noise_from_log_mean(np.array([np.nan]))[0])


def test_log_sample_pair_corrected_to_the_line_power():
    noise_dbm, line_dbm = -110.0, -106.0  # S/N 4 dB
    k = 10 ** 0.4
    reading = noise_dbm + float(detectors.rician_log_excess_db(k))  # what a long log average reads
    noise_read = noise_dbm + detectors.LOG_SAMPLE_BIAS_DB
    values = {"im3_lower_dbm": np.array([reading, reading]), "noise_lower_dbm": np.array([noise_read, noise_read])}
    out = detectors.as_power_readings(values, np.array(["sample", ""], object), np.array(["log", ""], object))
    corrected, _ = noise_corrected_dbm(out["im3_lower_dbm"], out["noise_lower_dbm"])
    assert corrected[0] == pytest.approx(line_dbm, abs=1e-4)
    # Without the mode stored (the second point) the reading stays as read: 1 dB low here.
    assert out["im3_lower_dbm"][1] == reading and corrected[1] < line_dbm - 0.8


def test_peak_flag_only_near_the_noise_and_not_twice():
    a = {"im3_lower_dbm": np.array([-90.0, -100.0, -108.0]), "noise_lower_dbm": np.full(3, -110.0),
         "im3_upper_dbm": np.array([-90.0, -100.0, -108.0]), "noise_upper_dbm": np.full(3, -110.0),
         "noise_peak_detected": np.ones(3)}
    flagged = [i for i, _ in detectors.detector_flags(a, np.array([False, False, True]))]
    assert flagged == [1]  # 20 dB over is left, 2 dB over is already noise-flagged
