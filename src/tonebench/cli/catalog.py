"""Characterization database commands: devices, spec limits, queries, comparison reports,
export and import."""

from __future__ import annotations

import typer


def register_catalog_commands(app: typer.Typer) -> None:
    """Add the device, limit, query, compare, export and import commands to the main app."""
