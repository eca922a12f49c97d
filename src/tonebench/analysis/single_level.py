"""Results at each drive level of a sweep: IM3 in dBc and the single-point intercepts, per point.

A data-sheet or production check states IMD at one tone level (or a few), not a fitted
intercept; these values need one point, so a one-level plan gets them even where the fit
(three valid points, sweep_fit.MIN_VALID_POINTS) is refused.

Per point, every power DUT-referred (pin at the input plane, tones and products at the output):
- IM3 in dBc relative to one tone: each product against its adjacent tone, the lower product
  2f1-f2 against the f1 output and the upper 2f2-f1 against f2 (the tone next to it on the
  spectrum, what a reader of a trace compares). IM3 readings are noise-corrected as in the fit.
- IM3 in dBc relative to the two-tone peak envelope power. The two tones' envelope peaks where
  their phasors align: PEP = (sqrt(P1) + sqrt(P2))^2 in linear power; for equal tones 4 P, so
  dBc re PEP = dBc re one tone - 6.02 dB (the textbook two-tone relation, e.g. Pozar, Microwave
  and RF Design of Wireless Systems, two-tone test; quoted from memory).
- The single-point intercepts (analysis/intercepts.py, the one home of the formula): with equal
  tones IIP3 = Pin + delta/2 and OIP3 = Pout + delta/2, delta = -(dBc re tone).
- A bound on each point's IIP3 from its flags (the same per-point flags the fit uses): half the
  analyzer's relative level accuracy plus every flag's IIP3 error added linearly (worst case for
  one reading); None where a flag cannot be bounded (overload, a product within 3 dB of the
  noise). The bound on IM3 dBc is twice the part of that bound that is a reading error (level
  accuracy, noise, analyzer and source products), leaving out compression and tone imbalance,
  which change what the intercept means but not the product read.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tonebench.analysis import flags as fl
from tonebench.analysis.conventions import DEFAULT_CONVENTION, reported_intercepts
from tonebench.analysis.intercepts import point_intercepts
from tonebench.analysis.sweep_fit import noise_corrected_dbm

# Flags that bear on the intercept extrapolated from a point but not on the product it reads.
_NOT_READING_ERRORS = (fl.COMPRESSED, fl.TONE_IMBALANCE)
# The slope point flag only says the fit left the point out (higher-order terms): at its own
# level the reading stands.
_NO_ERROR = (fl.SLOPE,)


@dataclass(frozen=True)
class LevelResults:
    """Per point (arrays, one value per point of the sweep, in its order): dB, dBc and dBm.
    iip3_bound_db and im3_bound_db are NaN where a flag cannot be bounded."""

    tone_dbm: np.ndarray
    im3_lower_dbc: np.ndarray
    im3_upper_dbc: np.ndarray
    im3_lower_dbc_pep: np.ndarray
    im3_upper_dbc_pep: np.ndarray
    iip3_lower_dbm: np.ndarray
    iip3_upper_dbm: np.ndarray
    oip3_lower_dbm: np.ndarray
    oip3_upper_dbm: np.ndarray
    iip3_dbm: np.ndarray  # under the convention
    oip3_dbm: np.ndarray
    iip3_bound_db: np.ndarray
    im3_bound_db: np.ndarray

    @property
    def im3_dbc(self) -> np.ndarray:
        """The worse (higher) of the two products re its tone: what an IMD limit judges."""
        return np.fmax(self.im3_lower_dbc, self.im3_upper_dbc)

    @property
    def im3_dbc_pep(self) -> np.ndarray:
        return np.fmax(self.im3_lower_dbc_pep, self.im3_upper_dbc_pep)


def pep_dbm(tone1_dbm, tone2_dbm) -> np.ndarray:
    """Peak envelope power of two tones (dBm): (sqrt(P1) + sqrt(P2))^2, powers in mW."""
    amplitude = np.sqrt(10.0 ** (np.asarray(tone1_dbm, dtype=float) / 10.0)) \
        + np.sqrt(10.0 ** (np.asarray(tone2_dbm, dtype=float) / 10.0))
    return 20.0 * np.log10(amplitude)


def _bounds(point_flags, level_accuracy_db: float) -> tuple[np.ndarray, np.ndarray]:
    """(IIP3 bound, IM3 dBc bound) per point from its flags (see the module docstring)."""
    n = len(point_flags)
    iip3, im3 = np.empty(n), np.empty(n)
    for i, flags in enumerate(point_flags):
        counted = [f for f in flags if f.flag not in _NO_ERROR]
        if any(f.error_db is None for f in counted):
            iip3[i] = im3[i] = np.nan
            continue
        reading = sum(f.error_db for f in counted if f.flag not in _NOT_READING_ERRORS)
        other = sum(f.error_db for f in counted if f.flag in _NOT_READING_ERRORS)
        iip3[i] = level_accuracy_db / 2.0 + reading + other
        im3[i] = level_accuracy_db + 2.0 * reading
    return iip3, im3


def level_results(a: dict[str, np.ndarray], point_flags, level_accuracy_db: float,
                  convention: str = DEFAULT_CONVENTION) -> LevelResults:
    """Each point's IMD and single-point intercepts. a: the sweep's arrays by name
    (SweepData.arrays()); point_flags: the assessment's flags per point."""
    im3_lower, _ = noise_corrected_dbm(a["im3_lower_dbm"], a["noise_lower_dbm"])
    im3_upper, _ = noise_corrected_dbm(a["im3_upper_dbm"], a["noise_upper_dbm"])
    pts = point_intercepts(a["pin1_dbm"], a["pin2_dbm"], a["pout_f1_dbm"], a["pout_f2_dbm"], im3_lower, im3_upper)
    pep = pep_dbm(a["pout_f1_dbm"], a["pout_f2_dbm"])
    iip3, oip3 = reported_intercepts(pts.iip3_lower_dbm, pts.iip3_upper_dbm, pts.oip3_lower_dbm,
                                     pts.oip3_upper_dbm, convention)
    iip3_bound, im3_bound = _bounds(point_flags, level_accuracy_db)
    return LevelResults(
        tone_dbm=np.asarray(a["tone_dbm"], dtype=float),
        im3_lower_dbc=im3_lower - a["pout_f1_dbm"], im3_upper_dbc=im3_upper - a["pout_f2_dbm"],
        im3_lower_dbc_pep=im3_lower - pep, im3_upper_dbc_pep=im3_upper - pep,
        iip3_lower_dbm=pts.iip3_lower_dbm, iip3_upper_dbm=pts.iip3_upper_dbm,
        oip3_lower_dbm=pts.oip3_lower_dbm, oip3_upper_dbm=pts.oip3_upper_dbm,
        iip3_dbm=np.asarray(iip3, dtype=float), oip3_dbm=np.asarray(oip3, dtype=float),
        iip3_bound_db=iip3_bound, im3_bound_db=im3_bound)
