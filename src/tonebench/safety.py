"""Power limits, checked for the whole plan before RF goes on and again for every source command.

Predictions use the bench file's expected DUT gain and path losses: the tone power at the DUT
input plane comes from the plan, the source setting adds the input loss, and the analyzer sees
both tones amplified by the expected gain less the output loss.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tonebench.config.bench_file import BenchLimits
from tonebench.errors import InputError
from tonebench.offsets import LossTable
from tonebench.plan import PlannedPoint

TWO_EQUAL_TONES_DB = 10.0 * np.log10(2.0)  # total power of two equal tones over one of them


@dataclass(frozen=True)
class SourceRange:
    label: str
    min_power_dbm: float
    max_power_dbm: float


@dataclass(frozen=True)
class PointLevels:
    source1_dbm: float
    source2_dbm: float
    analyzer_input_dbm: float


def predict_levels(point: PlannedPoint, offsets: dict[str, LossTable], limits: BenchLimits) -> PointLevels:
    source1_dbm = point.tone_dbm + offsets["in1"].loss_db(point.f1_hz)
    source2_dbm = point.tone_dbm + offsets["in2"].loss_db(point.f2_hz)
    out_loss_db = min(offsets["out"].loss_db(point.f1_hz), offsets["out"].loss_db(point.f2_hz))
    analyzer_input_dbm = point.tone_dbm + TWO_EQUAL_TONES_DB + limits.expected_gain_db - out_loss_db
    return PointLevels(source1_dbm, source2_dbm, analyzer_input_dbm)


def check_plan(
    points: list[PlannedPoint],
    offsets: dict[str, LossTable],
    limits: BenchLimits,
    sources: tuple[SourceRange, SourceRange],
    analyzer_damage_dbm: float | None,
    origin: str,
) -> None:
    """Refuse the whole plan (InputError, one line) if any point would break a limit."""
    analyzer_limit_dbm = limits.max_analyzer_input_dbm
    if analyzer_damage_dbm is not None:
        analyzer_limit_dbm = min(analyzer_limit_dbm, analyzer_damage_dbm)
    for point in points:
        if point.tone_dbm > limits.max_tone_dbm:
            raise InputError(
                f"{origin}: point {point.key} asks {point.tone_dbm:.2f} dBm per tone at the DUT input; "
                f"the bench limit max_tone_dbm is {limits.max_tone_dbm:.2f} dBm"
            )
        levels = predict_levels(point, offsets, limits)
        for source, setting_dbm in zip(sources, (levels.source1_dbm, levels.source2_dbm)):
            check_source_power(source, setting_dbm, point.key)
        if levels.analyzer_input_dbm > analyzer_limit_dbm:
            raise InputError(
                f"{origin}: point {point.key} would put {levels.analyzer_input_dbm:.2f} dBm into the "
                f"analyzer (expected gain {limits.expected_gain_db:.1f} dB); the limit is {analyzer_limit_dbm:.2f} dBm"
            )


def check_source_power(source: SourceRange, setting_dbm: float, point_key: str) -> None:
    if not source.min_power_dbm <= setting_dbm <= source.max_power_dbm:
        raise InputError(
            f"point {point_key}: {source.label} would be set to {setting_dbm:.2f} dBm; it allows "
            f"{source.min_power_dbm:.2f} to {source.max_power_dbm:.2f} dBm"
        )


def power_guard(offsets: dict[str, LossTable], limits: BenchLimits, analyzer_damage_dbm: float | None):
    """The run-time check of every source power command (SignalSource.power_guard).

    The pre-flight check covers the plan; this one covers each command actually sent (leveling
    corrections included), through the same offsets: the tone at the DUT input plane must stay
    within max_tone_dbm, and two such tones through the expected gain within the analyzer limit.
    Raises LimitError naming the source, the command and the limit.
    """
    from tonebench.instruments.scpi import LimitError

    analyzer_limit_dbm = limits.max_analyzer_input_dbm
    if analyzer_damage_dbm is not None:
        analyzer_limit_dbm = min(analyzer_limit_dbm, analyzer_damage_dbm)
    paths = {"source1": "in1", "source2": "in2"}

    def guard(label: str, freq_hz: float, power_dbm: float) -> None:
        tone_dbm = power_dbm - offsets[paths[label]].loss_db(freq_hz)
        if tone_dbm > limits.max_tone_dbm + 1e-9:
            raise LimitError(
                f"{label}: {power_dbm:.2f} dBm at {freq_hz:.6g} Hz would put {tone_dbm:.2f} dBm at the DUT input; "
                f"the bench limit max_tone_dbm is {limits.max_tone_dbm:.2f} dBm"
            )
        analyzer_dbm = tone_dbm + TWO_EQUAL_TONES_DB + limits.expected_gain_db - offsets["out"].loss_db(freq_hz)
        if analyzer_dbm > analyzer_limit_dbm + 1e-9:
            raise LimitError(
                f"{label}: {power_dbm:.2f} dBm at {freq_hz:.6g} Hz would put {analyzer_dbm:.2f} dBm into the analyzer "
                f"(expected gain {limits.expected_gain_db:.1f} dB); the limit is {analyzer_limit_dbm:.2f} dBm"
            )

    return guard
