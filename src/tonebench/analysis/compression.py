"""1 dB compression point from a gain-versus-input-power sweep."""

from __future__ import annotations

import numpy as np

COMPRESSION_DB = 1.0


def p1db(pin_dbm, gain_db, small_signal_gain_db: float) -> tuple[float | None, float | None]:
    """Input and output P1dB (dBm) by linear interpolation of gain versus input power.

    pin_dbm and gain_db are 1-D arrays, one value per point (non-finite points are skipped).
    The point is where the gain first falls COMPRESSION_DB below small_signal_gain_db, searching
    up in input power. Output P1dB = input P1dB + small-signal gain - 1 dB. Returns (None, None)
    when the sweep never gets there, or is already there at its lowest power (nothing to
    interpolate from). With two tones the input is the per-tone power, so this is the two-tone
    (per-tone) P1dB, which for a memoryless cubic sits 4.77 dB below the single-tone one.
    """
    pin = np.asarray(pin_dbm, dtype=float).ravel()
    gain = np.asarray(gain_db, dtype=float).ravel()
    keep = np.isfinite(pin) & np.isfinite(gain)
    order = np.argsort(pin[keep], kind="stable")
    pin, gain = pin[keep][order], gain[keep][order]
    target_db = small_signal_gain_db - COMPRESSION_DB
    below = gain <= target_db
    if not below.any():
        return None, None
    k = int(np.argmax(below))
    if k == 0:
        return None, None
    # Gain falls from above the target at k-1 to at/below it at k: interpolate the crossing.
    frac = (gain[k - 1] - target_db) / (gain[k - 1] - gain[k])
    pin_1db = float(pin[k - 1] + frac * (pin[k] - pin[k - 1]))
    return pin_1db, pin_1db + target_db
