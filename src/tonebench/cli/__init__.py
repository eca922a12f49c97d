"""The tonebench command line (typer): one module per command family (main: run, resume, views,
analyze, report, sim, db; calibration; catalog; queue) and the demo. The top layer: it may import
anything, and nothing imports it. Bad input is one line and exit code 2 (cli/common.py).
"""

from tonebench.cli.main import app

__all__ = ["app"]
