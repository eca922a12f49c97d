"""The simulated DUT's baseband memory (sim/memory.py): the FFT simulation against its closed form.

Closed form (the module docstring; the mechanism from Vuolevi and Rahkonen, "Distortion in RF Power
Amplifiers", 2003, from memory): IM3 upper = C_upper (1 + rho e^(j theta) Z(df)), lower = C_lower
(1 + rho e^(j theta) conj(Z(df))), Z(df) = 1 / (1 + j df / f_pole).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tonebench.sim import memory, physics
from tonebench.sim.scenario import Scenario
from tonebench.sim.signal_chain import BenchTruth, SourceSetting, analyzer_input
from tonebench.units import dbm_to_vpeak

STRENGTH, POLE_HZ, PHASE_DEG = 0.5, 1e6, 90.0


def products(scenario: Scenario, spacing_hz: float, tone_dbm: float = -40.0):
    truth = BenchTruth(scenario)
    settings = (SourceSetting(2.45e9 - spacing_hz / 2, tone_dbm, True), SourceSetting(2.45e9 + spacing_hz / 2, tone_dbm, True))
    amp_v = analyzer_input(scenario, truth, settings, atten_db=200.0).amp_v  # the analyzer's own IM3 out of the way
    return amp_v[physics.product_bin(2, -1)], amp_v[physics.product_bin(-1, 2)]


@pytest.mark.parametrize("spacing_hz", [1e4, 3e5, 1e6, 3e6, 3e7])
def test_each_product_follows_the_closed_form(spacing_hz):
    plain = Scenario(sources={"system_ip3_dbm": 300.0})
    with_memory = Scenario(sources={"system_ip3_dbm": 300.0},
                           dut={"memory_strength": STRENGTH, "memory_pole_hz": POLE_HZ, "memory_phase_deg": PHASE_DEG})
    lower0, upper0 = products(plain, spacing_hz)
    lower, upper = products(with_memory, spacing_hz)
    want_lower, want_upper = memory.im3_factors(spacing_hz, STRENGTH, POLE_HZ, PHASE_DEG)
    assert lower / lower0 == pytest.approx(complex(want_lower), rel=1e-6)
    assert upper / upper0 == pytest.approx(complex(want_upper), rel=1e-6)
    asym_db = 20 * math.log10(abs(upper) / abs(lower)) - 20 * math.log10(abs(upper0) / abs(lower0))
    assert asym_db == pytest.approx(BenchTruth(with_memory).true_im3_asymmetry_db(spacing_hz), abs=1e-6)


def test_the_closed_form_by_hand_at_the_pole():
    # At df = f_pole, Z = (1 - j)/2; e^(j90) Z = (1 + j)/2 and e^(j90) conj(Z) = (-1 + j)/2, so with
    # rho = 0.5 the upper product is |1.25 + 0.25j| and the lower |0.75 + 0.25j| of the cubic's.
    lower_db, upper_db = memory.im3_change_db(POLE_HZ, STRENGTH, POLE_HZ, PHASE_DEG)
    assert upper_db == pytest.approx(20 * math.log10(abs(1.25 + 0.25j)), abs=1e-9)
    assert lower_db == pytest.approx(20 * math.log10(abs(0.75 + 0.25j)), abs=1e-9)


def test_in_phase_memory_changes_both_products_alike():
    # theta = 0: the two factors are complex conjugates, so no asymmetry at any spacing.
    spacing_hz = np.geomspace(1e3, 1e8, 11)
    assert np.max(np.abs(memory.im3_asymmetry_db(spacing_hz, 0.7, 2e5, 0.0))) < 1e-12
    assert np.max(np.abs(memory.im3_asymmetry_db(spacing_hz, 0.7, 2e5, 90.0))) > 3.0


def test_off_by_default_leaves_the_output_unchanged():
    assert Scenario().dut.memory_strength == 0.0
    lower0, upper0 = products(Scenario(), 1e6)
    tone_v = float(dbm_to_vpeak(-40.0))
    mem = memory.dut_memory_spectrum_v(Scenario().dut, -1.0, 1e6, tone_v, tone_v)
    assert not mem.any() and abs(lower0) > 0.0 and abs(upper0) > 0.0
