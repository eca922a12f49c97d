"""Points of runs as a CSV or Parquet file (`tonebench export --points FORMAT`, and the
DataFrames of RunView.points() from Python), written whole or not at all."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from tonebench.errors import InputError
from tonebench.files import replace_atomically
from tonebench.report.html import check_report_path

POINT_FORMATS = ("csv", "parquet")


def points_of(database, run_ids: list[str] | None) -> pd.DataFrame:
    """Every point of the given runs (GUIDs or prefixes; None: every run), one table."""
    guids = run_ids or list(database.runs()["run_guid"])
    frames = [database.run(guid).points() for guid in guids]
    if not frames:
        raise InputError("export --points: the database holds no run; nothing to export")
    return pd.concat(frames, ignore_index=True)


def write_points(frame: pd.DataFrame, path: Path, fmt: str) -> Path:
    """Write the table in `fmt`: into a temporary file beside `path`, then renamed over it, so a
    failed write leaves the old file (or none). CSV lists flags joined with ';'."""
    if fmt not in POINT_FORMATS:
        raise InputError(f"export --points {fmt!r}: allowed formats are {', '.join(POINT_FORMATS)}")
    if fmt == "parquet":
        try:
            import pyarrow  # noqa: F401 - pandas writes Parquet through it
        except ImportError:
            raise InputError('export --points parquet needs pyarrow: pip install "tonebench[parquet]"') from None
    path = check_report_path(path, "points file")
    if fmt == "csv":
        flat = frame.assign(flags=frame["flags"].map(lambda flags: ";".join(flags)))
        return replace_atomically(path, lambda tmp_name: flat.to_csv(tmp_name, index=False), "points file")
    return replace_atomically(path, lambda tmp_name: frame.to_parquet(tmp_name, index=False), "points file")
