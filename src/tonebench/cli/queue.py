"""Queue commands: add a plan to a bench's queue, list, cancel, and run a worker."""

from __future__ import annotations

import typer


def register_queue_commands(app: typer.Typer) -> None:
    """Add the queue and worker commands to the main app."""
