"""Per-point third-order intercepts from one two-tone reading (design.md section 3): the one home
of the formula, for a DUT (point_intercepts) and for the test system's own residual through a
thru (input_intercepts_dbm, IM3 already at the input plane).

All powers are referred to the DUT planes: pin at the DUT input, pout and IM3 at the DUT output.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class PointIntercepts:
    """Per-point results, each an array broadcast from the inputs (dB and dBm)."""

    gain_db: np.ndarray
    iip3_lower_dbm: np.ndarray
    iip3_upper_dbm: np.ndarray
    oip3_lower_dbm: np.ndarray
    oip3_upper_dbm: np.ndarray


def input_intercepts_dbm(pin1_dbm, pin2_dbm, im3_lower_in_dbm, im3_upper_in_dbm) -> tuple[np.ndarray, np.ndarray]:
    """Per point, slope 3, every power at one plane: (lower, upper) IIP3 in dBm.

    The lower product is 2*P1 + P2 - 2*IIP3 and the upper P1 + 2*P2 - 2*IIP3 (point_intercepts).
    """
    pin1 = np.asarray(pin1_dbm, dtype=float)
    pin2 = np.asarray(pin2_dbm, dtype=float)
    lower = (2.0 * pin1 + pin2 - np.asarray(im3_lower_in_dbm, dtype=float)) / 2.0
    upper = (pin1 + 2.0 * pin2 - np.asarray(im3_upper_in_dbm, dtype=float)) / 2.0
    return lower, upper


def point_intercepts(
    pin1_dbm, pin2_dbm, pout_f1_dbm, pout_f2_dbm, im3_lower_dbm, im3_upper_dbm
) -> PointIntercepts:
    """Intercepts of each point from its tone and IM3 powers (arrays of any broadcastable shape).

    Gain G (dB) is the mean of the two tone gains. The lower product 2f1-f2 has amplitude
    (3/4) a3 A1^2 A2, so its input-referred power is 2*P1 + P2 - 2*IIP3 (dBm); the upper
    product 2f2-f1 gives P1 + 2*P2 - 2*IIP3. Solving each for IIP3 keeps a small tone imbalance
    from biasing the result; with P1 = P2 both reduce to OIP3 = Pout + (Pout - Pim3)/2.
    """
    pin1 = np.asarray(pin1_dbm, dtype=float)
    pin2 = np.asarray(pin2_dbm, dtype=float)
    gain_db = ((np.asarray(pout_f1_dbm, dtype=float) - pin1)
               + (np.asarray(pout_f2_dbm, dtype=float) - pin2)) / 2.0
    # IM3 referred back to the DUT input by the same gain as the tones.
    im3_lower_in = np.asarray(im3_lower_dbm, dtype=float) - gain_db
    im3_upper_in = np.asarray(im3_upper_dbm, dtype=float) - gain_db
    iip3_lower, iip3_upper = input_intercepts_dbm(pin1, pin2, im3_lower_in, im3_upper_in)
    return PointIntercepts(
        gain_db=gain_db,
        iip3_lower_dbm=iip3_lower,
        iip3_upper_dbm=iip3_upper,
        oip3_lower_dbm=iip3_lower + gain_db,
        oip3_upper_dbm=iip3_upper + gain_db,
    )
