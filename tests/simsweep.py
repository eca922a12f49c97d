"""Test helper: measure one sweep on the simulated bench straight through its Python API.

No sockets, no database: the same reads the sequencer makes (four narrow spans with a noise marker
beside each IM3 product, the attenuation-step repeat, optional second-order reads), fast enough to
repeat a hundred times. Path losses come from the simulated truth, as a perfect calibration would
give them. Returns the arrays the analysis takes (tonebench.analysis.SweepData).
"""

from __future__ import annotations

import numpy as np

from tonebench.analysis import SweepData, analyzer_im3_dbm, optimum_atten_db
from tonebench.sim.signal_chain import SimBench
from tonebench.sim.scenario import Scenario

SPAN_RBW = 10.0
NOISE_OFFSET_SPAN = 0.4


def _read(bench: SimBench, center_hz: float, noise_offset_hz: float | None) -> tuple[float, float, bool]:
    state = bench.analyzer
    state.center_hz = center_hz
    bench.sweep()
    state.marker_freq_hz = center_hz
    product = bench.marker_power_dbm()
    noise = np.nan
    if noise_offset_hz is not None:
        state.marker_freq_hz = center_hz + noise_offset_hz
        noise = bench.marker_power_dbm()
    return product, noise, state.overloaded


def measure_sweep(scenario: Scenario, center_hz: float, spacing_hz: float, tones_dbm, *,
                  rbw_hz: float = 1000.0, atten_db: float | None = None, mixer_toi_dbm: float = 15.0,
                  danl_dbm_per_hz: float = -150.0, max_mixer_dbm: float = -10.0, step_top: int = 2,
                  step_db: float = 10.0, second_order: bool = False,
                  expected_gain_db: float | None = None) -> SweepData:
    """One sweep; atten_db None chooses the attenuation per point (optimum_atten_db)."""
    bench = SimBench(scenario)
    truth = bench.truth
    tones = np.asarray(tones_dbm, dtype=float)
    f1, f2 = center_hz - spacing_hz / 2, center_hz + spacing_hz / 2
    freqs = {"f1": f1, "f2": f2, "lower": 2 * f1 - f2, "upper": 2 * f2 - f1, "diff": f2 - f1, "sum": f1 + f2}
    out_loss = {k: truth.true_loss_db("out", v) for k, v in freqs.items()}
    state = bench.analyzer
    state.continuous = False
    state.rbw_hz = state.vbw_hz = rbw_hz
    state.span_hz = SPAN_RBW * rbw_hz
    noise_offset = NOISE_OFFSET_SPAN * state.span_hz
    gain_guess = truth.true_gain_db(center_hz) if expected_gain_db is None else expected_gain_db
    rows = []
    last = None
    for i, tone in enumerate(tones):
        bench.set_source(1, freq_hz=f1, power_dbm=tone + truth.true_loss_db("in1", f1), rf_on=True)
        bench.set_source(2, freq_hz=f2, power_dbm=tone + truth.true_loss_db("in2", f2), rf_on=True)
        bench.settle_source(1)
        bench.settle_source(2)
        if atten_db is None:
            # Predicted tone at the analyzer input: slope 1 from the last point, else the guess.
            predicted = tone + gain_guess - out_loss["f1"] if last is None else last[0] + (tone - last[1])
            atten = optimum_atten_db(predicted, mixer_toi_dbm, danl_dbm_per_hz, rbw_hz, 0.0, 70.0, 2.0,
                                     max_mixer_dbm).atten_db
        else:
            atten = atten_db
        state.atten_db = atten
        r = {}
        r["f1"], _, o1 = _read(bench, freqs["f1"], None)
        r["f2"], _, o2 = _read(bench, freqs["f2"], None)
        r["lower"], r["noise_lower"], o3 = _read(bench, freqs["lower"], -noise_offset)
        r["upper"], r["noise_upper"], o4 = _read(bench, freqs["upper"], noise_offset)
        overload = o1 or o2 or o3 or o4
        last = ((r["f1"] + r["f2"]) / 2, tone)
        predicted_lower, predicted_upper = analyzer_im3_dbm(r["f1"], r["f2"], atten, mixer_toi_dbm)
        near = min(r["lower"] - predicted_lower, r["upper"] - predicted_upper) < 20.0
        step = {}
        if i >= len(tones) - step_top or near:
            state.atten_db = atten + step_db
            step["lower"], step["noise_lower"], _ = _read(bench, freqs["lower"], -noise_offset)
            step["upper"], step["noise_upper"], _ = _read(bench, freqs["upper"], noise_offset)
            state.atten_db = atten
        if second_order:
            r["diff"], r["noise_diff"], _ = _read(bench, freqs["diff"], noise_offset)
            r["sum"], r["noise_sum"], _ = _read(bench, freqs["sum"], noise_offset)
        rows.append(dict(
            tone_dbm=tone, pin1_dbm=tone, pin2_dbm=tone,
            pout_f1_dbm=r["f1"] + out_loss["f1"], pout_f2_dbm=r["f2"] + out_loss["f2"],
            im3_lower_dbm=r["lower"] + out_loss["lower"], im3_upper_dbm=r["upper"] + out_loss["upper"],
            noise_lower_dbm=r["noise_lower"] + out_loss["lower"], noise_upper_dbm=r["noise_upper"] + out_loss["upper"],
            overload=overload, atten_db=atten, raw_f1_dbm=r["f1"], raw_f2_dbm=r["f2"],
            raw_lower_dbm=r["lower"], raw_upper_dbm=r["upper"],
            raw_noise_lower_dbm=r["noise_lower"], raw_noise_upper_dbm=r["noise_upper"],
            step_atten_db=step_db if step else np.nan,
            raw_lower_step_dbm=step.get("lower", np.nan), raw_upper_step_dbm=step.get("upper", np.nan),
            raw_noise_lower_step_dbm=step.get("noise_lower", np.nan),
            raw_noise_upper_step_dbm=step.get("noise_upper", np.nan),
            im2_diff_dbm=r.get("diff", np.nan) + out_loss["diff"], im2_sum_dbm=r.get("sum", np.nan) + out_loss["sum"],
            noise_diff_dbm=r.get("noise_diff", np.nan) + out_loss["diff"],
            noise_sum_dbm=r.get("noise_sum", np.nan) + out_loss["sum"],
        ))
    return SweepData(**{k: np.array([row[k] for row in rows]) for k in rows[0]})
