"""IM3 asymmetry: upper minus lower IM3 (dB), the visible sign of memory effects across spacing.

With the IM3 slope fixed at 3 each product lies on IM3 = 3 Pout - 2 OIP3 (per product, DUT output),
so at the same output tones the two products differ by 2 (OIP3_lower - OIP3_upper): positive when
the upper product is the stronger. From the stored intercepts, so every stored result has it.
"""

from __future__ import annotations

import math


def im3_asymmetry_db(oip3_lower_dbm: float | None, oip3_upper_dbm: float | None) -> float | None:
    """Upper minus lower IM3 (dB) from the two products' output intercepts; None without both."""
    if oip3_lower_dbm is None or oip3_upper_dbm is None:
        return None
    value = 2.0 * (float(oip3_lower_dbm) - float(oip3_upper_dbm))
    return value if math.isfinite(value) else None
