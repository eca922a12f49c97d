"""The bound on a fitted intercept: systematic terms added in full, random terms by their spread.

Systematic (the same sign on every point of a sweep, so averaging does not shrink them; each a
half-width in dB of IIP3, added linearly):
  level        the analyzer's relative level accuracy between the tone and IM3 readings, halved
               (IIP3 = Pin + (Pout - Pim3)/2);
  source       the phasor bound of the system's residual IM3 carried through the DUT gain;
  analyzer     the phasor bound of the analyzer's own IM3;
  compression  half the gain compression of the fitted points (a compressed point's intercept
               reads low by about half its compression for a cubic).
Random (different on every point, combined root-sum-square):
  scatter      Student t (95 %, n-1) times the standard error of the per-point intercepts;
  noise        what the noise may leave after its correction, per point, shrunk by averaging.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

# Two-sided 95 % quantiles of Student's t for 1..30 degrees of freedom (standard tables; from
# memory, checked against a numpy simulation in the tests). Above 30 the 30 value is kept.
_T95 = (12.706, 4.303, 3.182, 2.776, 2.571, 2.447, 2.365, 2.306, 2.262, 2.228, 2.201, 2.179,
        2.160, 2.145, 2.131, 2.120, 2.110, 2.101, 2.093, 2.086, 2.080, 2.074, 2.069, 2.064,
        2.060, 2.056, 2.052, 2.048, 2.045, 2.042)

SYSTEMATIC_TERMS = ("level", "source", "analyzer", "compression")
RANDOM_TERMS = ("scatter", "noise")


def t95(dof: int) -> float:
    """Two-sided 95 % Student t quantile for dof degrees of freedom (dof >= 1)."""
    if dof < 1:
        raise ValueError("t95 needs at least 1 degree of freedom")
    return _T95[min(dof, len(_T95)) - 1]


def scatter_half_width_db(values) -> float:
    """95 % half-width of the mean of values (dB): t95(n-1) * s / sqrt(n); 0 for fewer than 2."""
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    if values.size < 2:
        return 0.0
    return t95(values.size - 1) * float(np.std(values, ddof=1)) / math.sqrt(values.size)


@dataclass(frozen=True)
class Bound:
    """Half-width (dB) of the interval around a fitted intercept, and its terms by name."""

    half_width_db: float
    terms_db: dict[str, float]


def combine(terms_db: dict[str, float]) -> Bound:
    """Systematic terms add linearly; the random ones (scatter, noise) root-sum-square."""
    unknown = set(terms_db) - set(SYSTEMATIC_TERMS) - set(RANDOM_TERMS)
    if unknown:
        raise ValueError(f"unknown bound term(s) {sorted(unknown)}")
    systematic = sum(terms_db.get(name, 0.0) for name in SYSTEMATIC_TERMS)
    random = math.sqrt(sum(terms_db.get(name, 0.0) ** 2 for name in RANDOM_TERMS))
    return Bound(systematic + random, dict(terms_db))
