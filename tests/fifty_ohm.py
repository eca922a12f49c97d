"""Power and peak voltage in a 50 ohm system: P = Vpeak^2 / (2 R), powers in dBm (1 mW reference),
from the SI definitions, computed here independently of the code under test."""

import numpy as np

R_OHM = 50.0


def volts_to_dbm(vpeak):
    return 10.0 * np.log10(np.abs(vpeak) ** 2 / (2.0 * R_OHM) / 1e-3)


def dbm_to_volts(p_dbm):
    return np.sqrt(2.0 * R_OHM * 1e-3 * 10.0 ** (np.asarray(p_dbm, dtype=float) / 10.0))
