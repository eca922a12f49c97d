"""Which third-order intercept a result reports: a plan's or bench's choice, with both the lower
(2f1-f2) and the upper (2f2-f1) intercept always kept beside it.

- "mean": the mean in dB of lower and upper (tonebench's behaviour before the choice existed;
  the default).
- "worse": the lower of the two IIP3, with the OIP3 of the same product (a data-sheet habit:
  the part is no better than its worse product).

Pure numpy; works on floats and on arrays (one value per point) alike.
"""

from __future__ import annotations

import numpy as np

INTERCEPT_CONVENTIONS = ("mean", "worse")
DEFAULT_CONVENTION = "mean"


def reported_intercepts(iip3_lower_dbm, iip3_upper_dbm, oip3_lower_dbm, oip3_upper_dbm,
                        convention: str = DEFAULT_CONVENTION):
    """(IIP3, OIP3) reported under `convention` (dBm). None in, None out (a refused fit)."""
    if convention not in INTERCEPT_CONVENTIONS:
        raise ValueError(f"intercept convention {convention!r}: allowed {', '.join(INTERCEPT_CONVENTIONS)}")
    if iip3_lower_dbm is None or iip3_upper_dbm is None:
        return None, None
    lower_i, upper_i = np.asarray(iip3_lower_dbm, dtype=float), np.asarray(iip3_upper_dbm, dtype=float)
    lower_o, upper_o = np.asarray(oip3_lower_dbm, dtype=float), np.asarray(oip3_upper_dbm, dtype=float)
    if convention == "mean":
        iip3, oip3 = (lower_i + upper_i) / 2.0, (lower_o + upper_o) / 2.0
    else:
        # The OIP3 of the product whose IIP3 is the lower: one side, not two minima mixed.
        lower_is_worse = lower_i <= upper_i
        iip3 = np.where(lower_is_worse, lower_i, upper_i)
        oip3 = np.where(lower_is_worse, lower_o, upper_o)
    if iip3.ndim == 0:
        return float(iip3), float(oip3)
    return iip3, oip3
