"""Two coherent products at one frequency: how far the reading can be from either (design sec. 4).

A reading r = |a + b| of a main product a and a second one b, |b|/|a| = 10^(-D/20), lies between
20log10(1 - 10^(-D/20)) and 20log10(1 + 10^(-D/20)) dB of |a|, whatever the phase between them.
"""

from __future__ import annotations

import numpy as np


def phasor_bounds_db(ratio_db) -> tuple[np.ndarray, np.ndarray]:
    """(low, high) in dB of |a + b| relative to |a|, for b ratio_db (D) below a, any phase.

    low is -inf where b is as large as a or larger (the two can cancel completely).
    """
    k = 10.0 ** (-np.asarray(ratio_db, dtype=float) / 20.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        low = np.where(k < 1.0, 20.0 * np.log10(np.abs(1.0 - k)), -np.inf)
    return low, 20.0 * np.log10(1.0 + k)


def reading_error_bounds_db(reading_over_other_db) -> tuple[np.ndarray, np.ndarray]:
    """(low, high) in dB of a reading r minus the wanted product |a|, given r and |b|.

    By the triangle inequality |a| lies in [r - |b|, r + |b|], so with k = |b|/r the reading is off
    by -20log10(1 + k) to -20log10(1 - k): the phasor bounds with their sign turned, with the ratio
    taken from the reading, which is what a measurement knows. high is +inf where |b| >= r.
    """
    low, high = phasor_bounds_db(reading_over_other_db)
    return -high, -low


def intercept_error_db(reading_over_other_db, order: int = 3) -> np.ndarray:
    """Half-width (dB) of the error an order-n intercept takes from a coherent second product.

    An intercept moves by -1/(order - 1) times the error of its product reading (IIP3: by half),
    so the half-width is -20log10(1 - k)/(order - 1), the larger side of the reading's bounds.
    inf where the second product may be as large as the reading.
    """
    low, high = reading_error_bounds_db(reading_over_other_db)
    return np.maximum(np.abs(low), high) / (order - 1)
