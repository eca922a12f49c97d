"""Power limits and frequency ranges, checked for the whole plan before RF goes on; power again
for every source command.

Predictions use the bench file's expected DUT gain and path losses through the one plane
arithmetic (planes/arithmetic.py): the tone power at the DUT input plane comes from the plan, the
source setting adds the input loss, and the analyzer sees the DUT output less the output loss at
each tone's own frequency (`predicted_analyzer_input_dbm` below is the one definition of that limit).

Frequency ranges come from the dialect files' [limits] (min_freq_hz, max_freq_hz), so a run, a
resume and `queue add` (which has no bench connection) check the same figures before anything
is connected: each source must reach its tone at every frequency it is stepped to, the analyzer
each read's whole span (centre +/- span/2), the power meter each tone it levels or calibrates.
The ranges are read from the dialect files by instruments/open_bench.py (plan/ never imports
the instruments) and handed in.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

from tonebench.config.bench_file import BenchLimits
from tonebench.errors import InputError, LimitError
from tonebench.plan.points import PlannedPoint
from tonebench.planes import arithmetic
from tonebench.planes.arithmetic import TWO_EQUAL_TONES_DB
from tonebench.planes.loss_table import LossTable
from tonebench.plan.axes import point_name_of_key
from tonebench.units import format_freq


@dataclass(frozen=True)
class SourceRange:
    label: str
    min_power_dbm: float
    max_power_dbm: float


@dataclass(frozen=True)
class FreqRange:
    """What one role's instrument covers, from its dialect's [limits]; label names it in errors."""

    label: str
    min_freq_hz: float
    max_freq_hz: float


@dataclass(frozen=True)
class FreqNeed:
    """A band one role must cover: a tone (low == high) or an analyzer read (centre +/- span/2)."""

    role: str
    what: str
    low_hz: float
    high_hz: float


@dataclass(frozen=True)
class PointLevels:
    source1_dbm: float
    source2_dbm: float
    analyzer_input_dbm: float


def analyzer_limit_dbm(limits: BenchLimits, damage_dbm: float | None) -> float:
    """The most the analyzer input may see: the bench file's max_analyzer_input_dbm, or the
    analyzer's own damage level (its dialect's damage_dbm) where that is lower."""
    limit_dbm = limits.max_analyzer_input_dbm
    return limit_dbm if damage_dbm is None else min(limit_dbm, damage_dbm)


def predicted_analyzer_input_dbm(tones: Iterable[tuple[float, float]], gain_db: float, out: LossTable) -> float:
    """The power predicted at the analyzer input, the figure checked against analyzer_limit_dbm.

    tones: (tone power at the DUT input plane dBm, its frequency Hz) for each tone known. Each tone
    arrives at the analyzer as its DUT output (tone + gain_db) less the output loss at that tone's
    own frequency; the check takes the highest of those arrivals and adds TWO_EQUAL_TONES_DB for the
    two tones present together, an upper bound on their total power (a lossier tone only arrives
    weaker). The plan check gives both tones of a point; the run-time guard the one tone it is
    commanding. Evaluated in the order (tone + 3.01 dB + gain) - loss, as the limits always were.
    """
    return max(
        arithmetic.analyzer_input_dbm(tone_dbm + TWO_EQUAL_TONES_DB + gain_db, out.loss_db(freq_hz))
        for tone_dbm, freq_hz in tones
    )


def expected_tone_dbm(point: PlannedPoint, offsets: dict[str, LossTable], limits: BenchLimits) -> float:
    """One tone's level expected at the analyzer input (dBm): the expected gain less the output
    loss at f1, before any point of its sweep has been read."""
    return arithmetic.analyzer_input_dbm(point.tone_dbm + limits.expected_gain_db, offsets["out"].loss_db(point.f1_hz))


def predict_levels(point: PlannedPoint, offsets: dict[str, LossTable], limits: BenchLimits) -> PointLevels:
    """Both source settings of a point (open loop) and the power predicted at the analyzer input."""
    source1_dbm = arithmetic.source_setting_dbm(point.tone_dbm, offsets["in1"].loss_db(point.f1_hz))
    source2_dbm = arithmetic.source_setting_dbm(point.tone_dbm, offsets["in2"].loss_db(point.f2_hz))
    tones = ((point.tone_dbm, point.f1_hz), (point.tone_dbm, point.f2_hz))
    return PointLevels(source1_dbm, source2_dbm, predicted_analyzer_input_dbm(tones, limits.expected_gain_db, offsets["out"]))


def check_plan(
    points: list[PlannedPoint],
    offsets: dict[str, LossTable],
    limits: BenchLimits,
    sources: tuple[SourceRange, SourceRange],
    analyzer_damage_dbm: float | None,
    origin: str,
) -> None:
    """Refuse the whole plan (InputError, one line) if any point would break a limit."""
    limit_dbm = analyzer_limit_dbm(limits, analyzer_damage_dbm)
    for point in points:
        if point.tone_dbm > limits.max_tone_dbm:
            raise InputError(
                f"{origin}: point {point.name} asks {point.tone_dbm:.2f} dBm per tone at the DUT input; "
                f"the bench limit max_tone_dbm is {limits.max_tone_dbm:.2f} dBm"
            )
        levels = predict_levels(point, offsets, limits)
        for source, setting_dbm in zip(sources, (levels.source1_dbm, levels.source2_dbm)):
            check_source_power(source, setting_dbm, point.key)
        if levels.analyzer_input_dbm > limit_dbm:
            raise InputError(
                f"{origin}: point {point.name} would put {levels.analyzer_input_dbm:.2f} dBm into the "
                f"analyzer (expected gain {limits.expected_gain_db:.1f} dB); the limit is {limit_dbm:.2f} dBm"
            )


def check_source_power(source: SourceRange, setting_dbm: float, point_key: str) -> None:
    if not source.min_power_dbm <= setting_dbm <= source.max_power_dbm:
        raise InputError(
            f"point {point_name_of_key(point_key)}: {source.label} would be set to {setting_dbm:.2f} dBm; it allows "
            f"{source.min_power_dbm:.2f} to {source.max_power_dbm:.2f} dBm"
        )


def power_guard(offsets: dict[str, LossTable], limits: BenchLimits, analyzer_damage_dbm: float | None):
    """The run-time check of every source power command (SignalSource.power_guard).

    The pre-flight check covers the plan; this one covers each command actually sent (leveling
    corrections included), through the same offsets: the tone at the DUT input plane must stay
    within max_tone_dbm, and the analyzer input predicted from it (predicted_analyzer_input_dbm, this tone
    at its own frequency) within the analyzer limit. Raises LimitError naming the source, the
    command and the limit.
    """
    limit_dbm = analyzer_limit_dbm(limits, analyzer_damage_dbm)
    paths = {"source1": "in1", "source2": "in2"}

    def guard(label: str, freq_hz: float, power_dbm: float) -> None:
        tone_dbm = arithmetic.tone_at_plane_dbm(power_dbm, offsets[paths[label]].loss_db(freq_hz))
        if tone_dbm > limits.max_tone_dbm + 1e-9:
            raise LimitError(
                f"{label}: {power_dbm:.2f} dBm at {format_freq(freq_hz)} would put {tone_dbm:.2f} dBm at the DUT input; "
                f"the bench limit max_tone_dbm is {limits.max_tone_dbm:.2f} dBm"
            )
        analyzer_dbm = predicted_analyzer_input_dbm(((tone_dbm, freq_hz),), limits.expected_gain_db, offsets["out"])
        if analyzer_dbm > limit_dbm + 1e-9:
            raise LimitError(
                f"{label}: {power_dbm:.2f} dBm at {format_freq(freq_hz)} would put {analyzer_dbm:.2f} dBm into the analyzer "
                f"(expected gain {limits.expected_gain_db:.1f} dB); the limit is {limit_dbm:.2f} dBm"
            )

    return guard


# --- frequency ranges -----------------------------------------------------------------------------


def check_frequency_needs(needs: Iterable[FreqNeed], ranges: dict[str, FreqRange], origin: str) -> None:
    """Refuse (InputError, one line) the first need outside its role's range; roles without a
    range (no such instrument) are not checked."""
    for need in needs:
        covered = ranges.get(need.role)
        if covered is None or covered.min_freq_hz <= need.low_hz and need.high_hz <= covered.max_freq_hz:
            continue
        band = f"{need.low_hz:.12g} Hz" if need.low_hz == need.high_hz else f"{need.low_hz:.12g}..{need.high_hz:.12g} Hz"
        raise InputError(
            f"{origin}: {need.what} needs {band}; {covered.label} covers {covered.min_freq_hz:.12g}.."
            f"{covered.max_freq_hz:.12g} Hz (min_freq_hz/max_freq_hz)"
        )


def read_need(what: str, center_hz: float, span_hz: float) -> FreqNeed:
    """An analyzer read centred on center_hz: the whole span must lie in the analyzer's range."""
    return FreqNeed("analyzer", what, center_hz - span_hz / 2.0, center_hz + span_hz / 2.0)


def plan_freq_needs(points: Iterable[PlannedPoint], span_hz: float, leveling: bool) -> list[FreqNeed]:
    """What a run reads per (centre, spacing): each source its tone, the analyzer f1, f2, 2f1-f2 and
    2f2-f1 over the span (the noise markers sit inside it), the meter the tones when leveling.
    Second-order products (f2-f1, f1+f2) are not needed: where the analyzer cannot read them the
    run skips them with a warning, the IIP3 measurement is whole without them."""
    needs: list[FreqNeed] = []
    seen = set()
    for point in points:
        if (point.f1_hz, point.f2_hz) in seen:
            continue
        seen.add((point.f1_hz, point.f2_hz))
        at = f"point {point.name}"
        needs += [FreqNeed("source1", f"{at} tone f1", point.f1_hz, point.f1_hz),
                  FreqNeed("source2", f"{at} tone f2", point.f2_hz, point.f2_hz)]
        for name, freq_hz in (("f1", point.f1_hz), ("f2", point.f2_hz), ("the lower IM3 product 2f1-f2", point.lower_hz),
                              ("the upper IM3 product 2f2-f1", point.upper_hz)):
            needs.append(read_need(f"{at} reading {name} at {freq_hz:.12g} Hz over a {span_hz:.12g} Hz span",
                                   freq_hz, span_hz))
        if leveling:
            needs += [FreqNeed("power_meter", f"{at} leveling tone f1", point.f1_hz, point.f1_hz),
                      FreqNeed("power_meter", f"{at} leveling tone f2", point.f2_hz, point.f2_hz)]
    return needs


def check_plan_frequencies(points: list[PlannedPoint], plan_settings, bench_settings, ranges: dict[str, FreqRange],
                           origin: str) -> None:
    """The pre-flight frequency check of a run, a resume or `queue add`, against the ranges of the
    bench's instruments (instruments/open_bench.py bench_freq_ranges reads them from the dialects)."""
    leveling = bench_settings.has_power_meter and bench_settings.leveling.enabled
    needs = plan_freq_needs(points, plan_settings.analyzer.effective_span_hz, leveling)
    check_frequency_needs(needs, ranges, origin)


def check_plan_parts(points: list[PlannedPoint], plan_settings, bench_settings, origin: str) -> None:
    """The bench parts a plan's axes need, before anything is switched on: bias and chamber."""
    check_plan_bias(points, plan_settings, bench_settings, origin)
    check_plan_temperatures(points, bench_settings, origin)


def check_plan_temperatures(points: list[PlannedPoint], bench_settings, origin: str) -> None:
    """A plan with temperatures needs a bench chamber, and each within its [chamber] limits."""
    temperatures_c = sorted({p.temperature_c for p in points if p.temperature_c is not None})
    if not temperatures_c:
        return
    limits = bench_settings.chamber
    if limits is None:
        raise InputError(f"{origin}: the plan has temperatures_c but the bench file names no chamber "
                         "(instruments.chamber and a [chamber] table of limits)")
    for temp_c in temperatures_c:
        if not limits.min_c <= temp_c <= limits.max_c:
            raise InputError(f"{origin}: temperature {temp_c:g} degC outside the bench file's [chamber] "
                             f"min_c..max_c ({limits.min_c:g}..{limits.max_c:g} degC)")


def check_plan_bias(points: list[PlannedPoint], plan_settings, bench_settings, origin: str) -> None:
    """The pre-flight bias check of a run, a resume or `queue add`: a plan with gate voltages needs
    a bench with gate and drain supplies and the other way round, and every gate and drain voltage
    must lie within the bench file's [bias] limits; all before anything is switched on."""
    plan_bias = getattr(plan_settings, "bias", None)
    if plan_bias is None and bench_settings.has_bias:
        raise InputError(f"{origin}: the bench has gate and drain supplies; the plan needs a [bias] table "
                         "(gate_v = [...], or gate_start_v, gate_stop_v, gate_step_v) so the device is biased "
                         "before RF goes on")
    if plan_bias is None:
        return
    if not bench_settings.has_bias:
        raise InputError(f"{origin}: the plan has a [bias] table but the bench file names no gate and drain "
                         "supplies (instruments.gate, instruments.drain and a [bias] table of limits)")
    check_bias_voltages(bench_settings.bias, (p.bias_v for p in points if p.bias_v is not None),
                        plan_bias.drain_v, origin)
    target_a = plan_bias.drain_current_a
    if target_a is not None and target_a >= bench_settings.bias.drain_current_limit_a:
        raise InputError(f"{origin}: [bias] drain_current_a {target_a:g} A is not below the bench file's "
                         f"drain_current_limit_a ({bench_settings.bias.drain_current_limit_a:g} A)")


def check_bias_voltages(limits, gate_voltages_v: Iterable[float], drain_v: float | None, origin: str) -> None:
    """Refuse (one line) a gate or drain voltage the bench file's [bias] limits do not allow."""
    for gate_v in gate_voltages_v:
        if not limits.gate_min_v <= gate_v <= limits.gate_max_v:
            raise InputError(f"{origin}: gate voltage {gate_v:g} V outside the bench file's [bias] "
                             f"gate_min_v..gate_max_v ({limits.gate_min_v:g}..{limits.gate_max_v:g} V)")
    if drain_v is not None and not 0.0 <= drain_v <= limits.drain_max_v:
        raise InputError(f"{origin}: drain voltage {drain_v:g} V outside 0..drain_max_v "
                         f"({limits.drain_max_v:g} V) of the bench file's [bias]")
