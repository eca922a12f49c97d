"""`tonebench.plan.load(path)`: a plan file as data for a notebook: its settings and its points."""

from __future__ import annotations

import dataclasses
from pathlib import Path

from tonebench.config.plan_file import load_plan
from tonebench.plan.points import PlannedPoint, expand


class PlanView:
    """A checked plan file: `name`, `sha256` (of its text, as stored with a run), `settings`
    (the validated tables) and points(), every point it expands to, in measuring order. (A
    bench-time estimate will join it when tonebench has one.)"""

    def __init__(self, path: Path | str) -> None:
        loaded = load_plan(Path(path))
        self.path = loaded.path
        self.sha256 = loaded.sha256
        self.settings = loaded.settings
        self.name = loaded.settings.plan.name

    def __repr__(self) -> str:
        return f"<tonebench plan {self.name!r}: {len(self.point_list())} points>"

    def point_list(self) -> list[PlannedPoint]:
        return expand(self.settings)

    def points(self):
        """A pandas DataFrame, one row per point: seq, key, name, the axis values (temperature_c,
        center_hz, spacing_hz, tone_dbm, bias_v) and the tone and product frequencies (Hz)."""
        import pandas as pd

        rows = [{**dataclasses.asdict(p), "key": p.key, "name": p.name, "f1_hz": p.f1_hz, "f2_hz": p.f2_hz,
                 "lower_hz": p.lower_hz, "upper_hz": p.upper_hz} for p in self.point_list()]
        return pd.DataFrame(rows)


def load(path: Path | str) -> PlanView:
    """Read and check a plan file (the same checks as `tonebench run`, InputError naming the field)."""
    return PlanView(path)
