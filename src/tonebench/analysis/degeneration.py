"""What-if: series (source) degeneration of the power-series coefficients from a DC sweep.

With an impedance Zs in the source, the device sees u = v - Zs i while i = g1 u + g2 u^2 + g3 u^3.
Inverting the series term by term (i = a1 v + a2 v^2 + a3 v^3, substitute, match powers of v):
    order 1: a1 = g1 (1 - Zs a1)                          ->  a1 = g1 / (1 + T),  T = g1 Zs
    order 2: a2 = -g1 Zs a2 + g2 (1 - Zs a1)^2            ->  a2 = g2 / (1 + T)^3
    order 3: a3 = -g1 Zs a3 - 2 g2 Zs a2 (1 - Zs a1) + g3 (1 - Zs a1)^3
             ->  a3 = [g3 (1 + T) - 2 g2^2 Zs] / (1 + T)^5
(using 1 - Zs a1 = 1 / (1 + T)); this is the standard source-degeneration result, re-derived here.

Limit for a reactive Zs (an inductor at freq_hz): the formula uses one impedance for every
product, so it is a narrowband approximation. The g2^2 term really comes from second-order
currents at f2 - f1 and 2 f1, where an inductor's impedance is far from its value at f1; a
frequency-dependent (Volterra) treatment would use Zs at those frequencies. For a resistor it is
exact (to third order).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import find_peaks

from tonebench.analysis.transconductance import TransconductanceResult, predicted_iip3_dbm
from tonebench.errors import InputError
from tonebench.units import SYSTEM_IMPEDANCE_OHM


def inductor_ohm(inductance_h: float, freq_hz: float) -> complex:
    """jwL: the impedance of an ideal inductor at freq_hz."""
    return 2j * np.pi * freq_hz * inductance_h


def degenerated_coefficients(g1, g2, g3, source_z_ohm: complex):
    """(g1', g2', g3') with a source impedance source_z_ohm (complex arrays; see module docstring)."""
    g1, g2, g3 = (np.asarray(g, dtype=complex) for g in (g1, g2, g3))
    loop = 1.0 + g1 * source_z_ohm
    return g1 / loop, g2 / loop**3, (g3 * loop - 2.0 * g2**2 * source_z_ohm) / loop**5


@dataclass(frozen=True)
class DegeneratedPrediction:
    """Degenerated coefficients and predicted IIP3 (dBm) at gate_v, and the sweet spots (V).

    sweet_spot_v: for a resistor, every sign change of g3' (linear interpolation); for a complex
    Zs, g3' is complex and need not pass through zero, so it holds the dips of |g3'| inside the
    sweep (at least NULL_DEPTH_DB deep on both sides). The quadrature 2 g2^2 Zs term fills the
    null in as the reactance grows: then there is none, rather than the end of the sweep where
    |g3'| merely keeps falling.
    shift_v: each sweet spot less the nearest undegenerated one (None where either is missing).
    """

    gate_v: np.ndarray
    g1: np.ndarray
    g2: np.ndarray
    g3: np.ndarray
    iip3_dbm: np.ndarray
    sweet_spot_v: list[float]
    shift_v: list[float] | None


NULL_DEPTH_DB = 3.0  # a dip of |g3'| shallower than this is a slope's wobble, not a null


def _dips(v: np.ndarray, g3: np.ndarray) -> list[float]:
    """Interior minima of |g3'| with NULL_DEPTH_DB of prominence (scipy's find_peaks on -dB)."""
    with np.errstate(divide="ignore"):
        level_db = 20.0 * np.log10(np.abs(g3))
    found, _ = find_peaks(-level_db, prominence=NULL_DEPTH_DB)
    return [float(v[i]) for i in found]


def _real_zeros(v: np.ndarray, g3: np.ndarray) -> list[float]:
    cross = np.nonzero(g3[:-1] * g3[1:] < 0.0)[0]
    return [float(v[i] - g3[i] * (v[i + 1] - v[i]) / (g3[i + 1] - g3[i])) for i in cross]


def degenerate(
    result: TransconductanceResult,
    source_z_ohm: complex,
    source_ohm: float = SYSTEM_IMPEDANCE_OHM,
) -> DegeneratedPrediction:
    """Apply source degeneration to a transconductance result and predict IIP3 and sweet spots.

    IIP3 is (2/3)|g1'/g3'|/Rs (predicted_iip3_dbm, with the moduli of the complex coefficients).
    """
    z = complex(source_z_ohm)
    if z.real < 0:
        raise InputError("source_z_ohm: a passive degeneration has a non-negative resistance")
    g1, g2, g3 = degenerated_coefficients(result.g1, result.g2, result.g3, z)
    with np.errstate(divide="ignore"):
        iip3 = predicted_iip3_dbm(np.abs(g1), np.abs(g3), source_ohm)
    v = result.gate_v
    if z.imag == 0.0:
        spots = _real_zeros(v, g3.real)
    else:
        spots = _dips(v, g3)
    before = _real_zeros(v, result.g3)
    shifts = None
    if spots and before:
        shifts = [s - min(before, key=lambda b: abs(b - s)) for s in spots]
    return DegeneratedPrediction(
        gate_v=v, g1=g1, g2=g2, g3=g3, iip3_dbm=iip3, sweet_spot_v=spots, shift_v=shifts
    )
