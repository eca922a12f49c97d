"""How a run is stopped on purpose (not by an error): the bench file's on_point_failure policy, a
soak that never settles, a tripped bias supply."""

from __future__ import annotations


class RunStopped(Exception):
    """The run stops with status 'paused' or 'aborted' and this reason (RF and bias off)."""

    def __init__(self, status: str, reason: str):
        super().__init__(reason)
        self.status = status
