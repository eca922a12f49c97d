"""The simulated analyzer's detectors and trace averaging against their textbook biases (sim/detector.py).

Noise alone (RF off): the mean over the trace's 1001 independent points of each reading, against
the default detector's power mean. Sources of the expected figures beside each check.
"""

import math

import numpy as np
import pytest

from tonebench.sim import detector
from tonebench.sim.scenario import Scenario
from tonebench.sim.signal_chain import SimBench


def _bench(seed=3):
    bench = SimBench(Scenario(seed=seed))
    bench.analyzer.continuous = False
    bench.analyzer.center_hz, bench.analyzer.span_hz = 2.45e9, 1e4
    bench.analyzer.rbw_hz = bench.analyzer.vbw_hz = 1e3
    return bench


def _noise_mean_dbm(bench, sweeps=20):
    """The true mean noise power in the RBW (dBm): the default (power-mean) detector over many sweeps."""
    watts = np.concatenate([10 ** (bench.sweep() / 10) for _ in range(sweeps)])
    return 10 * math.log10(watts.mean())


def _read(bench, det, avg, count):
    bench.analyzer.detector = detector.DetectorState(det, avg, count > 1, count)
    return bench.sweep()


def test_log_sample_bias_is_the_rayleigh_figure():
    # Mean of 10 log10 of an exponential variable: -10 log10(e) * Euler's gamma = -2.507 dB
    # (from memory; the textbook Rayleigh-envelope result).
    assert detector.LOG_SAMPLE_BIAS_DB == pytest.approx(-2.507, abs=0.001)


@pytest.mark.parametrize("det, avg, count, expected_db, tol_db", [
    ("rms", "power", 10, 0.0, 0.05),         # a power mean is unbiased
    ("sample", "power", 10, 0.0, 0.12),      # each sample exponential, its power mean unbiased
    ("sample", "log", 10, detector.LOG_SAMPLE_BIAS_DB, 0.15),  # mean in dB: 2.51 dB low
    ("peak", "power", 10, detector.peak_bias_db(16), 0.15),    # E[max of 16 exponentials] = H_16
])
def test_noise_reading_bias(det, avg, count, expected_db, tol_db):
    bench = _bench()
    truth_dbm = _noise_mean_dbm(bench)
    trace_dbm = _read(bench, det, avg, count)
    if avg == "log":
        reading_db = float(np.mean(trace_dbm)) - truth_dbm   # a log average is read as a mean in dB
    else:
        reading_db = 10 * math.log10(np.mean(10 ** (trace_dbm / 10))) - truth_dbm
    assert reading_db == pytest.approx(expected_db, abs=tol_db)


def test_peak_bias_grows_with_samples_per_bin():
    assert detector.peak_bias_db(1) == 0.0
    assert detector.peak_bias_db(16) == pytest.approx(10 * math.log10(3.3807), abs=0.001)


@pytest.mark.parametrize("det, avg", [("rms", "log"), ("sample", "log"), ("sample", "power"), ("peak", "power")])
def test_a_tone_far_above_noise_reads_the_same_with_every_detector(det, avg):
    bench = _bench()
    bench.set_source(1, freq_hz=2.45e9, power_dbm=-30.0, rf_on=True)
    bench.settle_source(1)
    bench.analyzer.marker_freq_hz = 2.45e9
    bench.sweep()
    default_dbm = bench.marker_power_dbm()
    _read(bench, det, avg, 4)
    assert bench.marker_power_dbm() == pytest.approx(default_dbm, abs=0.02)


def test_a_trace_average_takes_count_sweeps_of_bench_time():
    bench = _bench()
    start_s = bench.clock_s
    _read(bench, "rms", "power", 5)
    assert bench.clock_s - start_s == pytest.approx(5 * bench.sweep_time_s())


def test_default_detector_keeps_the_old_draws():
    # The default path is physics.trace_power_w, draw for draw: same seed, same trace.
    first, second = _bench(seed=11), _bench(seed=11)
    second.analyzer.detector = detector.DetectorState()
    assert np.array_equal(first.sweep(), second.sweep())


def test_scpi_detector_and_average_commands():
    from tonebench.sim.instruments import SimAnalyzer

    bench = _bench()
    panel = SimAnalyzer(bench)
    panel.handle_line("DET SAMP;:AVER:TYPE LOG;:AVER:COUN 16;:AVER ON")
    state = bench.analyzer.detector
    assert (state.detector, state.average_type, state.average_count, state.averaging) == ("sample", "log", 16, True)
    assert panel.handle_line("DET?;:AVER:TYPE?;:AVER:COUN?;:AVER?") == "SAMP;LOG;16;1"
    panel.handle_line("SENSE:DETECTOR:FUNCTION POSITIVE")
    assert bench.analyzer.detector.detector == "peak"
    panel.handle_line("DET QPE")
    panel.handle_line("AVER:COUN 2.5")
    assert panel.handle_line("SYST:ERR?").startswith("-224,")
    assert panel.handle_line("SYST:ERR?").startswith("-222,")
    panel.handle_line("*RST")
    assert bench.analyzer.detector.is_default
