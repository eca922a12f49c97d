"""DataFrames of stored rows: one column per field, units in the names, as the CLI exports them."""

from __future__ import annotations

import pandas as pd

from tonebench.catalog.query import EXPORT_FIELDS, LATER_AXIS_FIELDS


def results_frame(rows) -> pd.DataFrame:
    """ResultRow objects (catalog.query) as a DataFrame with the columns of `find --json`."""
    names = (*EXPORT_FIELDS, *LATER_AXIS_FIELDS)
    return pd.DataFrame([{name: getattr(row, name) for name in names} for row in rows], columns=list(names))
