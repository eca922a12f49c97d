"""A plan checked against a bench from the files alone (no instrument connected, nothing written):
what `queue add` and `run --dry-run` do before a run exists. Then the analyzer settings each point
would get and the bench time the plan takes (run/bench_time.py)."""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy.orm import sessionmaker

from tonebench.config.bench_file import LoadedBench
from tonebench.config.plan_file import LoadedPlan
from tonebench.instruments.dialect import Dialect, load_dialect
from tonebench.instruments.open_bench import bench_freq_ranges
from tonebench.plan.limits import (
    SourceRange,
    check_plan,
    check_plan_frequencies,
    check_plan_parts,
    expected_tone_dbm,
    predict_levels,
)
from tonebench.plan.points import PlannedPoint, expand
from tonebench.planes.loss_table import LossTable
from tonebench.run.attenuation_choice import AttenuationChoice
from tonebench.run.bench_time import (
    BenchTimeEstimate,
    estimate_bench_time,
    sweep_time_s,
    sweeps_per_point,
)
from tonebench.run.calibration_choice import choose_calibration


@dataclass(frozen=True)
class Preflight:
    plan: LoadedPlan
    bench: LoadedBench
    points: list[PlannedPoint]
    offsets: dict[str, LossTable]
    dialects: dict[str, Dialect]

    def estimate(self) -> BenchTimeEstimate:
        return estimate_bench_time(self.points, self.plan.settings, self.bench.settings, self.dialects)


def preflight(plan: LoadedPlan, bench: LoadedBench, sessions: sessionmaker | None,
              cal_name: str | None = None) -> Preflight:
    """The run's pre-flight checks from the dialect files: power limits with the path losses the
    run will use (cal_name, else the bench file's [bench] calibration set, else its [offsets]) and
    every instrument's frequency range. A plan refused here would be refused at run time."""
    dialects = {role: load_dialect(entry.dialect) for role, entry in bench.settings.instruments.items()}
    ranges = tuple(SourceRange(role, dialects[role].limits["min_power_dbm"], dialects[role].limits["max_power_dbm"])
                   for role in ("source1", "source2"))
    points = expand(plan.settings)
    origin = f"plan {plan.path}"
    check_plan_frequencies(points, plan.settings, bench.settings, bench_freq_ranges(bench.settings), origin)
    check_plan_parts(points, plan.settings, bench.settings, origin)
    chosen = choose_calibration(bench, cal_name or bench.settings.bench.calibration, sessions, points, origin)
    check_plan(points, chosen.tables, bench.settings.limits, ranges, dialects["analyzer"].limits.get("damage_dbm"),
               origin)
    return Preflight(plan, bench, points, chosen.tables, dialects)


@dataclass(frozen=True)
class _FileAnalyzer:
    """The analyzer as its dialect file and the bench file describe it (for the attenuation choice)."""

    limits: dict
    performance: dict


def point_settings(pre: Preflight) -> list[dict[str, str]]:
    """Per point: source settings, the analyzer input predicted from the expected gain, the
    attenuation and RBW it would be read with, and its sweeps (a well-behaved device)."""
    plan, bench = pre.plan.settings, pre.bench.settings
    analyzer = _FileAnalyzer(pre.dialects["analyzer"].limits,
                             {**pre.dialects["analyzer"].performance, **bench.instruments["analyzer"].performance})
    choice = AttenuationChoice(analyzer, plan.analyzer, lambda *_: None)
    sweeps = sweeps_per_point(pre.points, plan, pre.points, bench.unattended.settle_tolerance_db > 0)
    one_sweep_s = sweep_time_s(plan, bench, pre.dialects["analyzer"])
    tone_s = sweep_time_s(plan, bench, pre.dialects["analyzer"], tones=True)
    rows = []
    for point, (tones, products) in zip(pre.points, sweeps):
        levels = predict_levels(point, pre.offsets, bench.limits)
        tone_dbm = expected_tone_dbm(point, pre.offsets, bench.limits)
        setup, how = choice.setup_for(lambda: tone_dbm)
        rows.append({"Point": point.name, "Source 1 dBm": f"{levels.source1_dbm:.2f}",
                     "Source 2 dBm": f"{levels.source2_dbm:.2f}", "Analyzer in dBm": f"{tone_dbm:.1f}",
                     "Atten dB": f"{setup.atten_db:g} ({how})", "RBW Hz": f"{setup.rbw_hz:g}"
                     + ("" if plan.analyzer.tone_rbw_hz is None else f" (tones {plan.analyzer.tone_rbw_hz:g})"),
                     "Sweeps": str(tones + products), "Sweep time": f"{tones * tone_s + products * one_sweep_s:.3g} s"})
    return rows
