"""The simulated analyzer's video filter: below the RBW it smooths the noise reading and slows
the sweep; at the RBW or wider it changes nothing.

Expected values (common practice, from memory): a video filter of bandwidth VBW < RBW averages
about RBW/VBW independent noise samples, so the scatter of the noise power falls as
sqrt(VBW/RBW); it settles RBW/VBW times slower, so the sweep takes k * span / (RBW * VBW).
"""

from __future__ import annotations

import numpy as np
import pytest

from tonebench.sim.scenario import Scenario
from tonebench.sim.signal_chain import SimBench

RBW_HZ = 1000.0


def noise_trace_w(vbw_hz: float, seed: int = 5) -> tuple[np.ndarray, float]:
    """A trace of noise alone (sources off) and the sweep's time."""
    bench = SimBench(Scenario.model_validate({"seed": seed, "analyzer": {"noise_averages": 4}}))
    state = bench.analyzer
    state.continuous = False
    state.center_hz, state.span_hz, state.rbw_hz, state.vbw_hz = 1.0e9, 10 * RBW_HZ, RBW_HZ, vbw_hz
    sweep_s = bench.sweep_time_s()
    return 1e-3 * 10.0 ** (bench.sweep() / 10.0), sweep_s


@pytest.mark.parametrize("vbw_hz", [RBW_HZ / 10, RBW_HZ / 100])
def test_a_narrow_video_filter_smooths_the_noise_as_sqrt_vbw_over_rbw(vbw_hz):
    wide_w, wide_s = noise_trace_w(RBW_HZ)
    narrow_w, narrow_s = noise_trace_w(vbw_hz)
    # Relative spread of 1001 trace points: 1/sqrt(k) for Gamma(k, 1/k); sampling error about 3 %.
    ratio = (np.std(narrow_w) / np.mean(narrow_w)) / (np.std(wide_w) / np.mean(wide_w))
    assert ratio == pytest.approx(np.sqrt(vbw_hz / RBW_HZ), rel=0.12)
    assert np.mean(narrow_w) == pytest.approx(np.mean(wide_w), rel=0.1)  # the mean power stays
    assert narrow_s == pytest.approx(wide_s * RBW_HZ / vbw_hz)


def test_a_video_filter_at_or_over_the_rbw_changes_nothing():
    at_w, at_s = noise_trace_w(RBW_HZ)
    over_w, over_s = noise_trace_w(3 * RBW_HZ)
    assert np.array_equal(at_w, over_w) and at_s == over_s
