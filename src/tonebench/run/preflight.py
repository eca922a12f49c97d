"""A plan checked against a bench from the files alone (no instrument connected, nothing written):
what `queue add` and `run --dry-run` do before a run exists. Then the analyzer settings each point
would get and the bench time the plan takes (run/bench_time.py)."""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy.orm import sessionmaker

from tonebench.config.bench_file import BenchFile, LoadedBench
from tonebench.config.plan_file import LoadedPlan, PlanFile
from tonebench.instruments.analyzer import AnalyzerSetup, sweep_time_model_s
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
    sweep_time_factor,
    sweeps_per_point,
)
from tonebench.run.calibration_choice import choose_calibration
from tonebench.run.mixer_run import check_mixer_plan
from tonebench.run.read_settings import ProductChoice, TargetReads, tone_setup_for


@dataclass(frozen=True)
class Preflight:
    plan: LoadedPlan
    bench: LoadedBench
    points: list[PlannedPoint]
    offsets: dict[str, LossTable]
    dialects: dict[str, Dialect]

    def setups(self) -> list[PlannedSetup]:
        return planned_setups(self.points, self.plan.settings, self.bench.settings, self.dialects, self.offsets)

    def estimate(self) -> BenchTimeEstimate:
        return estimate_bench_time(self.points, self.plan.settings, self.bench.settings, self.dialects,
                                   setups=[(p.tone_setup, p.setup) for p in self.setups()])


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
    check_mixer_plan(points, plan.settings, bench.settings, bench_freq_ranges(bench.settings), chosen.tables.get("out"),
                     origin)
    return Preflight(plan, bench, points, chosen.tables, dialects)


@dataclass(frozen=True)
class _FileAnalyzer:
    """The analyzer as its dialect file and the bench file describe it (for the attenuation choice)."""

    limits: dict
    performance: dict

    def predicted_sweep_time_s(self, setup: AnalyzerSetup) -> float:
        return sweep_time_model_s(self.performance["sweep_time_factor"], setup.span_hz, setup.rbw_hz, setup.vbw_hz)


@dataclass(frozen=True)
class PlannedSetup:
    """A point's analyzer settings predicted from the files: the products' setup and how its
    attenuation was chosen, the tones' setup, the RBW choice for an accuracy target."""

    setup: AnalyzerSetup
    how: str
    tone_setup: AnalyzerSetup
    target: ProductChoice | None
    tone_at_analyzer_dbm: float


def planned_setups(points: list[PlannedPoint], plan: PlanFile, bench: BenchFile, dialects: dict[str, Dialect],
                   offsets: dict[str, LossTable]) -> list[PlannedSetup]:
    """Each point's analyzer settings as the sequencer would choose them on a device with the
    expected gain (and, for an accuracy target, the plan's iip3_guess_dbm)."""
    analyzer = _FileAnalyzer(dialects["analyzer"].limits,
                             {**dialects["analyzer"].performance, **bench.instruments["analyzer"].performance})
    choice = AttenuationChoice(analyzer, plan.analyzer, lambda *_: None)
    target_reads = TargetReads(choice, analyzer.predicted_sweep_time_s) if plan.analyzer.reads_to_target else None
    planned = []
    for point in points:
        tone_dbm = expected_tone_dbm(point, offsets, bench.limits)
        target = None
        if target_reads is not None:
            setup, how, target = target_reads.setup_for(point, lambda tone_dbm=tone_dbm: tone_dbm, None)
        else:
            setup, how = choice.setup_for(lambda tone_dbm=tone_dbm: tone_dbm)
        planned.append(PlannedSetup(setup, how, tone_setup_for(plan.analyzer, setup, point.spacing_hz), target,
                                    tone_dbm))
    return planned


def point_settings(pre: Preflight) -> list[dict[str, str]]:
    """Per point: source settings, the analyzer input predicted from the expected gain, the
    attenuation and RBW it would be read with, and its sweeps (a well-behaved device)."""
    plan, bench = pre.plan.settings, pre.bench.settings
    sweeps = sweeps_per_point(pre.points, plan, pre.points, bench.unattended.settle_tolerance_db > 0)
    factor = sweep_time_factor(bench, pre.dialects["analyzer"])
    rows = []
    for point, planned, (tones, products) in zip(pre.points, pre.setups(), sweeps):
        levels = predict_levels(point, pre.offsets, bench.limits)
        setup, tone_setup = planned.setup, planned.tone_setup
        time_s = (tones * sweep_time_model_s(factor, tone_setup.span_hz, tone_setup.rbw_hz, tone_setup.vbw_hz)
                  + products * sweep_time_model_s(factor, setup.span_hz, setup.rbw_hz, setup.vbw_hz))
        rows.append({"Point": point.name, "Source 1 dBm": f"{levels.source1_dbm:.2f}",
                     "Source 2 dBm": f"{levels.source2_dbm:.2f}", "Analyzer in dBm": f"{planned.tone_at_analyzer_dbm:.1f}",
                     "Atten dB": f"{setup.atten_db:g} ({planned.how})", "RBW Hz": f"{setup.rbw_hz:g}"
                     + ("" if tone_setup.rbw_hz == setup.rbw_hz else f" (tones {tone_setup.rbw_hz:g})")
                     + ("" if setup.vbw_hz >= setup.rbw_hz else f", VBW {setup.vbw_hz:g}"),  # slows the sweep
                     "Sweeps": str(tones + products), "Sweep time": f"{time_s:.3g} s"})
    return rows
