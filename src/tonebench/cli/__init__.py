"""The tonebench command line (typer)."""

from tonebench.cli.main import app

__all__ = ["app"]
