"""The simulated analyzer's LO phase noise (sim/phase_noise.py): a tone's skirt read at an offset
as noise, P + L(df) + 10 log10(ENBW), ENBW = 1.065 RBW for the Gaussian filter (reciprocal mixing;
common practice, from memory)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tonebench.sim import phase_noise, physics
from tonebench.sim.scenario import Scenario
from tonebench.sim.signal_chain import SimBench


def skirt_reading_dbm(offset_hz: float, dbc_per_hz: float | None, tone_dbm: float = -10.0, rbw_hz: float = 300.0):
    analyzer = {"danl_dbm_per_hz": -200.0, "noise_averages": 20_000, "mixer_toi_dbm": 300.0,
                "phase_noise_dbc_per_hz": dbc_per_hz, "phase_noise_offset_hz": 1e4}
    bench = SimBench(Scenario(thru=True, analyzer=analyzer, paths={"in1_loss_db": 0.0, "in1_slope_db_per_ghz": 0.0,
                                                                    "out_loss_db": 0.0, "out_slope_db_per_ghz": 0.0}))
    bench.set_source(1, freq_hz=2.45e9, power_dbm=tone_dbm, rf_on=True)
    bench.settle_source(1)
    state = bench.analyzer
    state.center_hz, state.span_hz, state.rbw_hz, state.vbw_hz, state.atten_db = 2.45e9 + offset_hz, 10 * rbw_hz, rbw_hz, rbw_hz, 10.0
    return float(np.mean(bench.sweep()[400:600])), tone_dbm + 10 * math.log10(physics.noise_bandwidth_hz(rbw_hz))


@pytest.mark.parametrize("offset_hz, want_l_dbc", [(1e4, -90.0), (1e5, -110.0), (3e3, -90.0)])
def test_a_tone_skirt_reads_tone_plus_l_plus_noise_bandwidth(offset_hz, want_l_dbc):
    read_dbm, tone_in_enbw_dbm = skirt_reading_dbm(offset_hz, -90.0)
    # 200 trace points of 20000 averages each scatter well under 0.01 dB; at 10 kHz the span
    # (+/- 1.5 kHz) straddles the corner of the profile, so the mean reads about 0.07 dB low.
    assert read_dbm == pytest.approx(tone_in_enbw_dbm + want_l_dbc, abs=0.1)


def test_an_ideal_lo_adds_nothing():
    read_dbm, _ = skirt_reading_dbm(1e4, None)
    assert read_dbm < -140.0  # the thru passes the thermal floor, -174 dBm/Hz + 25 dB; the skirt would be -75 dBm
    assert phase_noise.lo_phase_noise_dbc_per_hz(1e5, -100.0, 1e4) == pytest.approx(-120.0)
