"""The simulated mixer (sim/mixer.py): products at the IF, conversion gain, LO-dependent IIP3."""

import pytest
from sim.test_bench import quiet, read

from tonebench.sim.mixer import LO_SOURCE_INDEX, iip3_at_lo_dbm
from tonebench.sim.signal_chain import SimBench

F1_HZ, F2_HZ = 2.449e9, 2.451e9
LO_LOW_HZ, LO_HIGH_HZ = 2.3e9, 2.6e9  # low- and high-side injection, both giving IFs near 150 MHz
MIXER = {"conversion_gain_db": -6.5, "iip3_nominal_dbm": 12.0, "lo_nominal_dbm": 7.0, "starvation_db_per_db": 3.0}
# Lossless paths: the tone set at a source is the tone at the mixer's RF port.
LOSSLESS = {"in1_loss_db": 0.0, "in1_slope_db_per_ghz": 0.0, "in2_loss_db": 0.0, "in2_slope_db_per_ghz": 0.0,
            "out_loss_db": 0.0, "out_slope_db_per_ghz": 0.0}


def mixer_bench(**mixer) -> SimBench:
    return SimBench(quiet(mixer={**MIXER, **mixer}, paths=LOSSLESS))


def drive(bench: SimBench, tone_dbm: float, lo_hz: float, lo_dbm: float, lo_on: bool = True) -> None:
    for index, freq_hz in ((1, F1_HZ), (2, F2_HZ)):
        bench.set_source(index, freq_hz=freq_hz, power_dbm=tone_dbm, rf_on=True)
    bench.set_source(LO_SOURCE_INDEX, freq_hz=lo_hz, power_dbm=lo_dbm, rf_on=lo_on)
    for index in (1, 2, LO_SOURCE_INDEX):
        bench.settle_source(index)


def iip3_read_dbm(bench: SimBench, tone_dbm: float, lo_hz: float) -> float:
    """IIP3 = Pin + (P_tone - P_IM3) / 2 at the output (the textbook two-tone relation, e.g. Pozar,
    Microwave Engineering), the lower IM3 at the IF of 2f1 - f2."""
    tone_if_hz, im3_if_hz = abs(F1_HZ - lo_hz), abs(2 * F1_HZ - F2_HZ - lo_hz)
    return tone_dbm + (read(bench, tone_if_hz) - read(bench, im3_if_hz)) / 2.0


def test_tones_come_out_at_the_if_with_the_conversion_gain():
    bench = mixer_bench()
    drive(bench, -30.0, LO_LOW_HZ, 7.0)
    assert read(bench, F1_HZ - LO_LOW_HZ) == pytest.approx(-30.0 - 6.5, abs=0.05)
    assert read(bench, F1_HZ) < -150.0  # nothing left at the RF


def test_high_side_injection_inverts_lower_and_upper():
    bench = mixer_bench()
    drive(bench, -20.0, LO_HIGH_HZ, 7.0)
    # 2f1 - f2 (the lower IM3 at the RF) lands above both tones at the IF.
    lower_rf_at_if_hz = LO_HIGH_HZ - (2 * F1_HZ - F2_HZ)
    assert lower_rf_at_if_hz > LO_HIGH_HZ - F1_HZ > LO_HIGH_HZ - F2_HZ
    im3_dbm = read(bench, lower_rf_at_if_hz)
    # Pure cubic: P_IM3 = 3 Pin - 2 IIP3 + G (textbook), here -60 - 24 - 6.5.
    assert im3_dbm == pytest.approx(3 * -20.0 - 2 * 12.0 - 6.5, abs=0.1)


def test_sum_output():
    bench = mixer_bench(output="sum")
    drive(bench, -30.0, LO_LOW_HZ, 7.0)
    assert read(bench, F1_HZ + LO_LOW_HZ) == pytest.approx(-36.5, abs=0.05)


def test_lo_off_converts_nothing():
    bench = mixer_bench()
    drive(bench, -30.0, LO_LOW_HZ, 7.0, lo_on=False)
    assert read(bench, F1_HZ - LO_LOW_HZ) < -150.0


@pytest.mark.parametrize("lo_dbm", [9.0, 7.0, 5.0, 3.0, 1.0])
def test_iip3_follows_the_lo_drive(lo_dbm):
    bench = mixer_bench()
    expected_dbm = 12.0 - 3.0 * max(0.0, 7.0 - lo_dbm)  # the model of sim/mixer.py, written out
    tone_dbm = expected_dbm - 35.0  # far below the intercept: the cubic's slope-3 region
    drive(bench, tone_dbm, LO_LOW_HZ, lo_dbm)
    assert bench.truth.true_mixer_iip3_dbm(lo_dbm) == pytest.approx(expected_dbm)
    assert iip3_at_lo_dbm(bench.scenario.mixer, lo_dbm) == pytest.approx(expected_dbm)
    assert iip3_read_dbm(bench, tone_dbm, LO_LOW_HZ) == pytest.approx(expected_dbm, abs=0.1)
