"""Noise-limited IM3 read again at a narrower RBW within the plan's time budget
(run/narrowing.py): the steps and the budget by hand, then end to end on the simulated bench,
where a product a few dB over the floor at 100 Hz is left a bound without a budget and comes out
measured, within its bound of the simulator's truth, with one."""

from __future__ import annotations

import math
from dataclasses import replace

import pytest
from flag_benches import run, write_bench, write_plan
from sqlalchemy import select

from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.run.narrowing import narrow_rbw_hz, narrowed, step_down_hz
from tonebench.sim.scenario import Scenario
from tonebench.sim.signal_chain import BenchTruth
from tonebench.store.models import Point, Result

from cleanruns import CENTER_HZ


def sweep_s(setup: AnalyzerSetup) -> float:
    return 2.5 * setup.span_hz / setup.rbw_hz ** 2  # the generic analyzer's model


def test_rbw_steps_and_budget_by_hand():
    assert [step_down_hz(x) for x in (100.0, 99.0, 30.0, 7.0, 0.13)] == pytest.approx([100.0, 50.0, 20.0, 5.0, 0.1])
    setup = AnalyzerSetup(span_hz=1000.0, rbw_hz=100.0, vbw_hz=100.0, atten_db=10.0, ref_level_dbm=0.0)
    fixed = lambda rbw_hz: narrowed(setup, rbw_hz)  # noqa: E731 - a fixed attenuation
    # 5 dB over the noise wants 13 (10 dB needed + 3 dB margin): 8 dB less noise, RBW 100 -> 10 Hz.
    assert narrow_rbw_hz(setup, 5.0, 30.0, sweep_s, fixed) == pytest.approx(10.0)
    # Two sweeps take 2 x 2.5 s at 10 Hz, 2 x 1.25 s at 20 Hz: 2 s buys 50 Hz (2 x 0.5 s), the best it can.
    assert narrow_rbw_hz(setup, 5.0, 2.0, sweep_s, fixed) == pytest.approx(50.0)
    assert narrow_rbw_hz(setup, 14.0, 30.0, sweep_s, fixed) is None  # enough already
    assert narrow_rbw_hz(setup, 5.0, 0.1, sweep_s, fixed) is None  # not even one step affordable
    # An attenuation that rises 1 dB per 3 dB less noise (the optimum) needs a narrower step.
    rising = lambda rbw_hz: replace(narrowed(setup, rbw_hz), atten_db=10.0 + 10 * math.log10(100.0 / rbw_hz) / 3)  # noqa: E731
    assert narrow_rbw_hz(setup, 5.0, 30.0, sweep_s, rising) == pytest.approx(5.0)


def _plan_with_budget(tmp_path, budget_s, name):
    plan = write_plan(tmp_path, -52.0, -42.0, name=name)
    text = plan.read_text().replace("rbw_hz = 1000.0", "rbw_hz = 100.0")
    if budget_s is not None:
        text = text.replace("rbw_hz = 100.0", f"rbw_hz = 100.0\nnarrowing_budget_s = {budget_s!r}")
    plan.write_text(text)
    return plan


def test_a_product_near_the_floor_is_measured_narrower_when_the_budget_allows(tmp_path):
    """IIP3 -2 dBm, a good analyzer (mixer TOI +30 dBm: noise is the limit, not its own IM3),
    tones -52 to -42 dBm at 100 Hz: the lower four points' products lie under 10 dB over the floor,
    too few points remain for a fit. With 30 s per point for narrow reads, they are read at 2 to
    20 Hz and the intercept is measured within its bound of the truth."""
    truth = BenchTruth(Scenario(dut={"iip3_dbm": -2.0})).true_iip3_dbm(CENTER_HZ)
    bench = write_bench(tmp_path, mixer_toi_dbm=30.0, declared_toi_dbm=30.0)
    results = {}
    for budget_s in (None, 30.0):
        folder = tmp_path / f"budget-{budget_s}"
        folder.mkdir()
        _, session, _ = run(folder, _plan_with_budget(folder, budget_s, "plan.toml"), bench)
        results[budget_s] = (session.scalars(select(Result)).one(), session.scalars(select(Point)).all())
    assert results[None][0].iip3_dbm is None  # only a bound at 100 Hz
    result, points = results[30.0]
    assert result.iip3_dbm is not None and abs(result.iip3_dbm - truth) <= result.iip3_bound_db < 0.5
    narrowed = [p for p in points if "im3_rbw_hz" in p.extra_json]
    assert len(narrowed) >= 3 and all(2.0 <= p.extra_json["im3_rbw_hz"] < 100.0 for p in narrowed)
    for p in narrowed:
        assert p.extra_json["im3_snr_at_plan_rbw_db"] < 10.0 + 3.0  # read again because it fell short
        assert p.extra_json["im3_sweep_time_s"] <= 30.0  # the budget held
        assert p.sweep_time_s >= p.extra_json["im3_sweep_time_s"]  # counted in the point's sweep time
