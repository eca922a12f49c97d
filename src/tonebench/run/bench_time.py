"""How long a plan keeps the bench busy, predicted before anything is switched on.

Bench time is the instruments' own time: analyzer sweeps (the dialect's sweep-time model, k *
span / RBW^2, or k * span / (RBW * VBW) with the VBW narrower, with the bench file's override
of k), source settling (the source dialects' settle_time_s, the longer of the two once per
point: both are set, then each *OPC? waited for, so they settle at the same time), gate changes
(ramp and settle), and the chamber's way to each new temperature: the ramp at the bench file's
ramp_c_per_min (from ROOM_C for the first; left out, none) and the dwell. Software and command
latency are not in it.

The sweeps per point follow the sequencer (run/sequencer.py): four reads (both tones, at the
plan's tone_rbw_hz when it has one, and both IM3 products); the IM3 pair again at each sweep's step_top_points highest tone powers (the
attenuation-step check); both tones again at each sweep's first point (the settle check, no line
to compare with yet); f2-f1 and f1+f2 when the plan asks for second order. What only the readings
decide (a step check because the analyzer's own IM3 came near, a settle check because a level
moved, narrow IM3 reads: only their budget's upper bound is said) is not counted: the estimate is that of a well-behaved device, and the run says afterwards
how far off it was.
"""

from __future__ import annotations

from dataclasses import dataclass

from tonebench.config.bench_file import BenchFile
from tonebench.config.plan_file import PlanFile
from tonebench.instruments.analyzer import AnalyzerSetup, sweep_time_model_s
from tonebench.instruments.dialect import Dialect
from tonebench.plan.points import PlannedPoint
from tonebench.units import format_duration

DEFAULT_SETTLE_TIME_S = 0.005  # a synthesized source's level and frequency settling (common practice)
ROOM_C = 23.0  # where the chamber is taken to start (it stays at the last set point of a command)


@dataclass(frozen=True)
class BenchTimeEstimate:
    points: int
    sweeps: int  # product sweeps (every sweep when the tones are read at the products' setup)
    sweep_time_s: float  # the longest of them
    sweeps_s: float  # every sweep, the tones' included
    settle_s: float
    bias_s: float
    soak_s: float
    narrowing_max_s: float = 0.0  # at most this more for narrow IM3 reads (not in the total)
    tone_sweeps: int = 0  # at the tones' own setup (none when the products': counted in sweeps)
    tone_sweep_time_s: float = 0.0  # the longest of them
    shortest_sweep_time_s: float | None = None  # of the product sweeps, when they differ (accuracy target)

    @property
    def total_s(self) -> float:
        return self.sweeps_s + self.settle_s + self.bias_s + self.soak_s

    def line(self) -> str:
        """One line: the total and where it goes."""
        shortest = self.shortest_sweep_time_s
        products = (f"{format_duration(self.sweep_time_s)}" if shortest is None
                    else f"{format_duration(shortest)} to {format_duration(self.sweep_time_s)}")
        parts = [f"{self.sweeps} sweeps of {products}"
                 + (f" and {self.tone_sweeps} tone sweeps of {format_duration(self.tone_sweep_time_s)}"
                    if self.tone_sweeps else "") + f" ({format_duration(self.sweeps_s)})",
                 f"source settling {format_duration(self.settle_s)}"]
        if self.bias_s:
            parts.append(f"gate changes {format_duration(self.bias_s)}")
        if self.soak_s:
            parts.append(f"chamber {format_duration(self.soak_s)}")
        line = (f"bench time estimate: {format_duration(self.total_s)} for {self.points} points ("
                + ", ".join(parts) + ")")
        if self.narrowing_max_s:
            line += f"; narrow IM3 reads up to {format_duration(self.narrowing_max_s)} more"
        return line

    def as_dict(self) -> dict:
        return {"total_s": self.total_s, "points": self.points, "sweeps": self.sweeps,
                "sweep_time_s": self.sweep_time_s, "sweeps_s": self.sweeps_s, "settle_s": self.settle_s,
                "bias_s": self.bias_s, "soak_s": self.soak_s, "narrowing_max_s": self.narrowing_max_s,
                "tone_sweeps": self.tone_sweeps, "tone_sweep_time_s": self.tone_sweep_time_s,
                "shortest_sweep_time_s": self.shortest_sweep_time_s}


def sweep_time_factor(bench: BenchFile, analyzer: Dialect) -> float:
    """The analyzer's k in k * span / RBW^2: the bench file's, else its dialect's."""
    return bench.instruments["analyzer"].performance.get("sweep_time_factor", analyzer.performance["sweep_time_factor"])


def sweep_time_s(plan: PlanFile, bench: BenchFile, analyzer: Dialect, tones: bool = False) -> float:
    """One sweep at the plan's span and RBW (tones: at its tone_rbw_hz, span ten of it, when it
    has one), by the analyzer's model (bench-file k first)."""
    factor = sweep_time_factor(bench, analyzer)
    settings = plan.analyzer
    if tones and settings.tone_rbw_hz is not None:
        return sweep_time_model_s(factor, 10.0 * settings.tone_rbw_hz, settings.tone_rbw_hz)
    return sweep_time_model_s(factor, settings.effective_span_hz, settings.rbw_hz, settings.effective_vbw_hz)


def sweeps_per_point(points: list[PlannedPoint], plan: PlanFile, todo: list[PlannedPoint],
                     settle_check: bool = True) -> list[tuple[int, int]]:
    """(tone sweeps, product sweeps) each point of `todo` takes on a well-behaved device (see
    the module docstring); the step-checked tone powers are those of each whole sweep in `points`."""
    levels: dict = {}
    for point in points:
        levels.setdefault(point.sweep_key, set()).add(point.tone_dbm)
    top = plan.analyzer.step_top_points
    stepped = {key: set(sorted(values)[-top:]) if top else set() for key, values in levels.items()}
    seen: set = set()
    counts = []
    for point in todo:
        tones, products = 2, 2
        if point.tone_dbm in stepped[point.sweep_key]:
            products += 2
        if point.sweep_key not in seen:  # a resumed sweep starts with no line to compare with either
            seen.add(point.sweep_key)
            tones += 2 if settle_check else 0
        if plan.sweep.second_order:
            products += 2
        counts.append((tones, products))
    return counts


def estimate_bench_time(points: list[PlannedPoint], plan: PlanFile, bench: BenchFile,
                        dialects: dict[str, Dialect], done_keys: frozenset[str] = frozenset(),
                        setups: list[tuple[AnalyzerSetup, AnalyzerSetup]] | None = None) -> BenchTimeEstimate:
    """The bench time of the points not yet measured (a resumed run leaves out `done_keys`).
    setups: (tones' setup, products' setup) of each point of `points`, as the sequencer will
    choose them (run/preflight.planned_setups); left out, the plan's for every point."""
    todo_index = [i for i, point in enumerate(points) if point.key not in done_keys]
    todo = [points[i] for i in todo_index]
    factor = sweep_time_factor(bench, dialects["analyzer"])
    counts = sweeps_per_point(points, plan, todo, bench.unattended.settle_tolerance_db > 0)
    if setups is None:
        tone_times = [sweep_time_s(plan, bench, dialects["analyzer"], tones=True)] * len(todo)
        product_times = [sweep_time_s(plan, bench, dialects["analyzer"])] * len(todo)
        apart = plan.analyzer.tone_rbw_hz is not None
    else:
        chosen = [setups[i] for i in todo_index]
        tone_times = [sweep_time_model_s(factor, tone.span_hz, tone.rbw_hz, tone.vbw_hz) for tone, _ in chosen]
        product_times = [sweep_time_model_s(factor, products.span_hz, products.rbw_hz, products.vbw_hz)
                         for _, products in chosen]
        apart = any((tone.rbw_hz, tone.span_hz) != (products.rbw_hz, products.span_hz) for tone, products in chosen)
    sweeps_s = sum(t * tone_s + p * product_s for (t, p), tone_s, product_s in zip(counts, tone_times, product_times))
    sweeps_s *= plan.analyzer.average_count or 1  # a trace average: that many sweeps per read
    tone_sweeps, product_sweeps = sum(t for t, _ in counts), sum(p for _, p in counts)
    if not apart:  # one kind of sweep
        tone_sweeps, product_sweeps = 0, tone_sweeps + product_sweeps
    longest_s = max(product_times, default=0.0)
    shortest_s = min(product_times, default=0.0)
    settle_s = max(dialects[role].performance.get("settle_time_s", DEFAULT_SETTLE_TIME_S)
                   for role in ("source1", "source2")) * len(todo)
    bias_s, soak_s = 0.0, 0.0
    if bench.bias is not None:
        gates = [point.bias_v for point in todo if point.bias_v is not None]
        changes = sum(1 for before, after in zip(gates, gates[1:]) if before != after)
        travel_v = sum(abs(after - before) for before, after in zip(gates, gates[1:]))
        bias_s = travel_v / bench.bias.ramp_v_per_s + changes * bench.bias.settle_s
    temperatures = list(dict.fromkeys(point.temperature_c for point in todo if point.temperature_c is not None))
    chamber = bench.chamber
    if temperatures and chamber is not None:
        soak_s = len(temperatures) * chamber.dwell_s
        if chamber.ramp_c_per_min is not None:
            path_c = [ROOM_C, *temperatures]
            soak_s += 60.0 * sum(abs(b - a) for a, b in zip(path_c, path_c[1:])) / chamber.ramp_c_per_min
    narrowing_max_s = (plan.analyzer.narrowing_budget_s or 0.0) * len(todo)
    return BenchTimeEstimate(len(todo), product_sweeps, longest_s, sweeps_s, settle_s, bias_s, soak_s, narrowing_max_s,
                             tone_sweeps, max(tone_times, default=0.0) if tone_sweeps else 0.0,
                             shortest_s if shortest_s < longest_s * (1 - 1e-9) else None)
