"""`[results]` in a plan or a bench file: which intercept a result reports and whether the
results per drive level are stored (analysis/conventions.py, analysis/single_level.py).

The plan's choice wins over the bench file's; with neither, the mean of lower and upper is
reported, and per-level results are stored only for a plan with fixed tone levels
(`[sweep] tone_levels_dbm`). The choice made is kept with the run (Run.metadata_json["results"]),
so a later `analyze` reports the same way.
"""

from __future__ import annotations

from typing import Literal

from tonebench.config.loading import StrictModel

INTERCEPTS = ("mean", "worse")


class ResultsSettings(StrictModel):
    # "mean": the mean of the lower and upper intercepts; "worse": the lower IIP3 of the two.
    intercept: Literal["mean", "worse"] | None = None
    # Store IM3 dBc and the single-point intercepts of every point (default: fixed-level plans only).
    per_level: bool | None = None


def results_choice(plan, bench) -> dict:
    """{"intercept": "mean"|"worse", "per_level": bool} for a run of `plan` (PlanFile) on `bench`
    (BenchFile): the plan's [results], else the bench file's, else the defaults."""
    plan_choice = getattr(plan, "results", None) or ResultsSettings()
    bench_choice = getattr(bench, "results", None) or ResultsSettings()
    intercept = plan_choice.intercept or bench_choice.intercept or "mean"
    per_level = plan_choice.per_level
    if per_level is None:
        per_level = bench_choice.per_level
    if per_level is None:
        per_level = plan.sweep.tone_levels_dbm_given
    return {"intercept": intercept, "per_level": bool(per_level)}
