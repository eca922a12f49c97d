"""`tonebench cal ...`: calibration sets (import, measure, list, show, expire)."""

from __future__ import annotations

import typer

cal_app = typer.Typer(help="Calibration sets: path losses and the system residual.", no_args_is_help=True)
