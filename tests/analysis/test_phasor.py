"""Phasor error bounds (design sec. 4) against direct complex sums computed with numpy."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from tonebench.analysis import (
    intercept_error_db,
    phasor_bounds_db,
    reading_error_bounds_db,
)

PHASES_RAD = np.linspace(0.0, 2.0 * np.pi, 3601)


def direct_sum_db(ratio_db):
    """|a + b| / |a| in dB over every phase of b, by complex arithmetic in numpy (|a| = 1)."""
    b = 10.0 ** (-ratio_db / 20.0) * np.exp(1j * PHASES_RAD)
    return 20.0 * np.log10(np.abs(1.0 + b))


@pytest.mark.parametrize("ratio_db", [0.5, 3.0, 6.0, 10.0, 14.0, 20.0, 30.0, 40.0])
def test_bounds_are_the_extremes_of_the_complex_sum(ratio_db):
    low, high = phasor_bounds_db(ratio_db)
    summed = direct_sum_db(ratio_db)
    # The grid holds phase 0 and 180 degrees exactly, where the extremes lie.
    assert summed.min() == pytest.approx(float(low), abs=1e-9)
    assert summed.max() == pytest.approx(float(high), abs=1e-9)


def test_design_figures():
    # A second product 20 dB down moves the reading by +0.83 / -0.92 dB (20log10(1 +/- 0.1)).
    low, high = phasor_bounds_db(20.0)
    assert (float(low), float(high)) == pytest.approx((20 * np.log10(0.9), 20 * np.log10(1.1)))
    # Equal products can cancel completely.
    low, _ = phasor_bounds_db(0.0)
    assert low == -np.inf


@given(ratio_db=st.floats(0.1, 60.0), phase=st.floats(0.0, 2 * np.pi), level_dbm=st.floats(-150, 10))
def test_reading_bounds_contain_the_wanted_product(ratio_db, phase, level_dbm):
    # Build a reading from a known product a and a second one b, then check that the bounds,
    # computed from the reading and |b| alone, contain the true error of the reading.
    a = 10.0 ** (level_dbm / 20.0)
    b = a * 10.0 ** (-ratio_db / 20.0) * np.exp(1j * phase)
    reading = abs(a + b)
    reading_db, b_db, a_db = (20 * np.log10(v) for v in (reading, abs(b), a))
    low, high = reading_error_bounds_db(reading_db - b_db)
    assert float(low) - 1e-9 <= reading_db - a_db <= float(high) + 1e-9
    # The IIP3 takes half the reading's error with its sign turned, within the half-width.
    assert abs(-(reading_db - a_db) / 2.0) <= float(intercept_error_db(reading_db - b_db)) + 1e-9


def test_reading_bounds_are_reached_in_phase_and_in_antiphase():
    for phase, side in ((0.0, 1), (np.pi, 0)):  # in phase reads high, antiphase low
        b = 0.2 * np.exp(1j * phase)
        reading = abs(1.0 + b)
        bounds = reading_error_bounds_db(20 * np.log10(reading / 0.2))
        assert float(bounds[side]) == pytest.approx(20 * np.log10(reading), abs=1e-12)


def test_intercept_error_order_two_takes_the_whole_error():
    assert float(intercept_error_db(20.0, order=2)) == pytest.approx(2 * float(intercept_error_db(20.0, order=3)))
    assert float(intercept_error_db(-1.0)) == np.inf
