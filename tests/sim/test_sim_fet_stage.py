"""The simulated FET coupled into the bench: the supplies' loads follow the FET, the DUT output
is the biased stage's, and its gain and IM3 agree with the textbook power series.

References: the two-tone power-series result that each IM3 line of y = a1 x + a3 x^3 with two
tones of amplitude A is (3/4) |a3| A^3 (any RF text's intermodulation chapter, e.g. Pozar,
Microwave Engineering, section on intermodulation; cited from memory). Derivatives here come from
finite differences of the drain current, independent of sim/fet.py's closed forms.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import pyvisa

from tonebench.sim import physics
from tonebench.sim.launch import start_sim_bench
from tonebench.sim.scenario import FetScenario, Scenario
from tonebench.sim.signal_chain import SimBench, SourceSetting

TONE_DBM = -40.0
TONE_V = math.sqrt(2.0 * 50.0 * 1e-3 * 10.0 ** (TONE_DBM / 10.0))  # peak V of -30 dBm in 50 ohm


def biased_bench(gate_v: float, drain_v: float = 3.0, **fet) -> SimBench:
    bench = SimBench(Scenario(fet=FetScenario(current_noise_a=0.0, **fet)))
    for role, voltage_v in (("gate", gate_v), ("drain", drain_v)):
        channel = bench.supplies[role].channel(1)
        channel.set_voltage_v, channel.current_limit_a, channel.output_on = voltage_v, 0.5, True
    return bench


def finite_difference_coefficients(bench: SimBench, gate_v: float, step_v: float = 2e-3) -> tuple[float, float]:
    """g1 and g3 = (1/6) d3Id/dV3 by central differences of the drain current (5-point stencil)."""
    fet, temp_k = bench.fet_bias.fet, bench.fet_bias.temp_k
    ids = [float(fet.drain_a(gate_v + k * step_v, temp_k)) for k in (-2, -1, 0, 1, 2)]
    g1 = (ids[3] - ids[1]) / (2 * step_v)
    d3 = (ids[4] - 2 * ids[3] + 2 * ids[1] - ids[0]) / (2 * step_v**3)
    return g1, d3 / 6.0


@pytest.mark.parametrize("gate_v", [0.50, 0.62, 0.70])
def test_stage_gain_and_im3_follow_the_power_series(gate_v):
    bench = biased_bench(gate_v, input_voltage_gain=1.4, load_ohm=75.0)
    stage = bench.fet_stage()
    g1, g3 = finite_difference_coefficients(bench, gate_v)
    k, rl, drain_factor = 1.4, 75.0, math.tanh(3.0 / 0.3)
    assert stage.gain_db() == pytest.approx(20 * math.log10(g1 * k * rl * drain_factor), abs=0.01)
    lines = physics.two_tone_products_v(stage, TONE_V, TONE_V)
    im3_expected_v = 0.75 * abs(g3) * (k * TONE_V) ** 3 * rl * drain_factor
    # At -40 dBm the fifth-order terms are far down except near the g3 zero (not sampled here).
    assert 20 * math.log10(abs(lines["im3_low"]) / im3_expected_v) == pytest.approx(0.0, abs=0.05)
    assert abs(lines["f1"]) == pytest.approx(g1 * k * rl * drain_factor * TONE_V, rel=0.01)


def test_input_intercept_is_the_gate_plane_one_less_the_match_gain():
    plain, matched = biased_bench(0.62), biased_bench(0.62, input_voltage_gain=2.0)
    assert plain.fet_stage().iip3_dbm() - matched.fet_stage().iip3_dbm() == pytest.approx(20 * math.log10(2.0))


def test_drain_supply_reads_the_fet_current_and_a_drain_below_the_knee_passes_less():
    bench = biased_bench(0.60)
    drain = bench.supplies["drain"]
    fet_a = float(bench.fet_bias.fet.drain_a(0.60, 300.0))
    assert drain.read_current_a(1) == pytest.approx(fet_a * math.tanh(10.0), rel=1e-9)
    bench.supplies["gate"].channel(1).set_voltage_v = 0.65
    assert drain.read_current_a(1) > 1.3 * fet_a  # the load follows the gate at once
    drain.channel(1).set_voltage_v = 0.15  # below the 0.3 V knee
    assert bench.fet_stage().gain_db() < biased_bench(0.65).fet_stage().gain_db() - 3.0


def test_no_drain_no_output_and_the_gate_draws_only_leakage():
    bench = biased_bench(0.60, drain_v=0.0)
    bench.supplies["drain"].channel(1).output_on = False
    assert bench.fet_stage().gain_db() == -math.inf
    for index in (1, 2):
        bench.set_source(index, freq_hz=2.45e9 + (index - 1.5) * 1e6, power_dbm=-10.0, rf_on=True)
    bench.settle_source(2)
    assert bench.input_power_dbm() == -math.inf  # nothing reaches the analyzer
    assert bench.supplies["gate"].read_current_a(1) == pytest.approx(0.60 / 1e9)


def test_drain_protection_trips_when_the_gate_pulls_too_much_current():
    bench = biased_bench(0.55)
    drain = bench.supplies["drain"].channel(1)
    drain.current_limit_a, drain.protection_on = 8e-3, True
    assert bench.supplies["drain"].read_current_a(1) < 8e-3
    bench.supplies["gate"].channel(1).set_voltage_v = 0.70  # Id about 22 mA
    assert bench.supplies["drain"].read_current_a(1) == 0.0
    assert drain.tripped and not drain.output_on
    assert bench.fet_stage().gain_db() == -math.inf  # a tripped drain passes no signal


def test_current_readings_scatter_by_the_scenario_noise():
    bench = SimBench(Scenario(fet=FetScenario(current_noise_a=2e-6)))
    for role, voltage_v in (("gate", 0.6), ("drain", 3.0)):
        channel = bench.supplies[role].channel(1)
        channel.set_voltage_v, channel.output_on = voltage_v, True
    readings = np.array([bench.supplies["drain"].read_current_a(1) for _ in range(2000)])
    true_a = bench.supplies["drain"].channel(1).operating_point()[1]
    assert readings.std() == pytest.approx(2e-6, rel=0.1)
    assert readings.mean() == pytest.approx(true_a, abs=4 * 2e-6 / math.sqrt(2000))


def test_supplies_over_scpi_bias_the_stage_the_analyzer_sees():
    scenario = Scenario(fet=FetScenario(current_noise_a=0.0))
    rm = pyvisa.ResourceManager("@py")
    with start_sim_bench(scenario) as running:
        handles = {role: rm.open_resource(running.resources[role], read_termination="\n", write_termination="\n")
                   for role in ("gate", "drain")}
        try:
            for role, voltage_v in (("gate", 0.62), ("drain", 2.5)):
                handles[role].write(f"VOLT {voltage_v};:CURR 0.1;:OUTP ON")
                assert handles[role].query("*OPC?").strip() == "1"  # the line is in force
            drain_a = float(handles["drain"].query("MEAS:CURR?"))
        finally:
            for handle in handles.values():
                handle.close()
        with running.bench.lock:
            stage = running.bench.fet_stage()
    assert (stage.gate_v, stage.drain_v) == (0.62, 2.5)
    assert drain_a == pytest.approx(float(stage.fet.drain_a(0.62, 300.0)) * math.tanh(2.5 / 0.3), rel=1e-9)


def test_without_a_fet_the_memoryless_dut_is_unchanged():
    bench = SimBench(Scenario())
    assert bench.fet_stage() is None and bench.supplies == {}
    bench.set_source(1, freq_hz=2.45e9, power_dbm=-50.0, rf_on=True)
    bench.settle_source(1)
    gain_db = bench.truth.true_gain_db(2.45e9)
    loss_db = bench.truth.true_loss_db("in1", 2.45e9) + bench.truth.true_loss_db("out", 2.45e9)
    assert bench.input_power_dbm() == pytest.approx(-50.0 - loss_db + gain_db, abs=0.01)
    assert SourceSetting().rf_on is False
