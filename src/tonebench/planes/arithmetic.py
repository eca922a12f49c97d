"""The one arithmetic between the DUT's planes and the instruments', both directions.

Losses are positive dB (planes/loss_table.py). On the input side a source setting reaches the DUT
input plane less the input loss; on the output side the DUT output reaches the analyzer less the
output loss. Every module that moves a power across a path goes through these four functions, so
a change of convention (a gain element in a path, a mixer's LO-dependent loss) lands here once.
The operand order is kept as the code had it, so stored values stay bit-identical.
"""

from __future__ import annotations

import numpy as np

TWO_EQUAL_TONES_DB = 10.0 * np.log10(2.0)  # total power of two equal tones over one of them


def source_setting_dbm(tone_dbm, input_loss_db):
    """The source setting that puts tone_dbm at the DUT input plane through input_loss_db."""
    return tone_dbm + input_loss_db


def tone_at_plane_dbm(setting_dbm, input_loss_db):
    """The tone at the DUT input plane from a source setting, through input_loss_db."""
    return setting_dbm - input_loss_db


def dut_output_dbm(reading_dbm, output_loss_db):
    """The power at the DUT output plane from an analyzer reading, through output_loss_db."""
    return reading_dbm + output_loss_db


def analyzer_input_dbm(dut_output_dbm, output_loss_db):
    """The power arriving at the analyzer input from a DUT output, through output_loss_db."""
    return dut_output_dbm - output_loss_db
