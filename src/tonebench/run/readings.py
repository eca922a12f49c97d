"""What the analyzer reads for one point (analyzer input plane, dBm): the two tones and both IM3
products with a noise marker beside each, the IM3 reads repeated by the attenuation-step check,
and the second-order products. Reads only: no settings chosen here, nothing stored."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

from tonebench.errors import InputError
from tonebench.instruments.analyzer import AnalyzerSetup, MarkerReading
from tonebench.instruments.bias import BiasReading
from tonebench.plan.points import PlannedPoint
from tonebench.planes.loss_table import LossTable
from tonebench.units import dbm_to_watt, format_freq, watt_to_dbm


@dataclass(frozen=True)
class Readings:
    """Analyzer readings of one point, as read (analyzer input plane)."""

    f1_dbm: float
    f2_dbm: float
    lower_dbm: float
    upper_dbm: float
    noise_lower_dbm: float
    noise_upper_dbm: float
    overload: bool
    sweep_time_s: float


@dataclass(frozen=True)
class StepReadings:
    """The IM3 reads repeated with step_atten_db more attenuation (analyzer input plane, dBm)."""

    step_atten_db: float
    lower_dbm: float
    upper_dbm: float
    noise_lower_dbm: float
    noise_upper_dbm: float
    reason: str  # "top" (a top point of its sweep) or "near" (analyzer IM3 predicted within 20 dB)
    sweep_time_s: float


@dataclass(frozen=True)
class SecondOrderReadings:
    """f2-f1 ("diff") and f1+f2 ("sum") with a noise marker beside each (analyzer input, dBm)."""

    diff_dbm: float
    sum_dbm: float
    noise_diff_dbm: float
    noise_sum_dbm: float
    sweep_time_s: float


@dataclass(frozen=True)
class Measured:
    """Everything one attempt at a point read, before it is accepted."""

    readings: Readings
    setup: AnalyzerSetup
    choice: str  # how the attenuation was chosen
    step: StepReadings | None
    second: SecondOrderReadings | None
    bias: BiasReading | None = None  # the gate and drain supplies' read-back, on a bias bench
    chamber_c: float | None = None  # the chamber's reading, on a point with a temperature
    narrow: object | None = None  # run/narrowing.NarrowRead: the IM3 read again narrower
    tone_rbw_hz: float | None = None  # the tones' RBW, when not the products' (setup)
    target: object | None = None  # run/read_settings.ProductChoice: the RBW chosen for an accuracy


def read_point(analyzer, point: PlannedPoint, noise_offsets_hz: Sequence[float], setup: AnalyzerSetup,
               tone_setup: AnalyzerSetup, errors_on_last: bool = False) -> Readings:
    """Four narrow-span reads, one per product, the tones at tone_setup and the products at
    setup (the same unless the plan reads tones wider); the noise floor is read beside each IM3
    product (read_im3). errors_on_last: the error query on the last read's line."""
    f1, f2 = _tones(analyzer, point, tone_setup)
    analyzer.apply(setup)
    lower, upper = read_im3(analyzer, point, noise_offsets_hz, errors_on_last)
    reads = (f1, f2, lower, upper)
    return Readings(
        f1_dbm=f1.powers_dbm[0],
        f2_dbm=f2.powers_dbm[0],
        lower_dbm=lower.powers_dbm[0],
        upper_dbm=upper.powers_dbm[0],
        noise_lower_dbm=lower.powers_dbm[1],
        noise_upper_dbm=upper.powers_dbm[1],
        overload=any(read.overload for read in reads),
        sweep_time_s=sum(read.sweep_time_s for read in reads),
    )


def read_tones_dbm(analyzer, point: PlannedPoint, tone_setup: AnalyzerSetup) -> tuple[float, float]:
    """Both tones read again (the settle check)."""
    f1, f2 = _tones(analyzer, point, tone_setup)
    return f1.powers_dbm[0], f2.powers_dbm[0]


def _tones(analyzer, point: PlannedPoint, tone_setup: AnalyzerSetup) -> tuple[MarkerReading, MarkerReading]:
    analyzer.apply(tone_setup)
    return (analyzer.read_markers(point.f1_hz, [point.f1_hz]),
            analyzer.read_markers(point.f2_hz, [point.f2_hz]))


def read_im3(analyzer, point: PlannedPoint, noise_offsets_hz: Sequence[float],
             errors_on_last: bool = False) -> tuple[MarkerReading, MarkerReading]:
    """Both IM3 products, each with noise markers noise_offsets_hz away from it on the side away
    from the tones (a negative offset: on the tones' side). Each reading's powers are the product
    and the noise: the mean power of the markers when there are several."""
    lower = analyzer.read_markers(point.lower_hz, [point.lower_hz, *(point.lower_hz - off for off in noise_offsets_hz)])
    upper = analyzer.read_markers(point.upper_hz, [point.upper_hz, *(point.upper_hz + off for off in noise_offsets_hz)],
                                  errors_now=errors_on_last)
    return _noise_averaged(lower), _noise_averaged(upper)


def _noise_averaged(reading: MarkerReading) -> MarkerReading:
    product_dbm, *noise_dbm = reading.powers_dbm
    if len(noise_dbm) == 1:
        return reading
    mean_w = math.fsum(float(dbm_to_watt(dbm)) for dbm in noise_dbm) / len(noise_dbm)
    return replace(reading, powers_dbm=(product_dbm, float(watt_to_dbm(mean_w))))


def step_readings(analyzer, point: PlannedPoint, noise_offsets_hz: Sequence[float], step_atten_db: float,
                  reason: str) -> StepReadings:
    """The IM3 reads again, the analyzer already set step_atten_db more attenuation (the last
    reads of a point: the error query on the last one's line)."""
    lower, upper = read_im3(analyzer, point, noise_offsets_hz, errors_on_last=True)
    return StepReadings(step_atten_db, lower.powers_dbm[0], upper.powers_dbm[0], lower.powers_dbm[1],
                        upper.powers_dbm[1], reason, lower.sweep_time_s + upper.sweep_time_s)


def second_order_blocked(analyzer_limits: dict, span_hz: float, out: LossTable, point: PlannedPoint) -> str | None:
    """Why f2-f1 and f1+f2 cannot be read for this point, or None."""
    diff_hz, sum_hz = point.f2_hz - point.f1_hz, point.f1_hz + point.f2_hz
    lim = analyzer_limits
    half_span_hz = span_hz / 2.0
    if diff_hz - half_span_hz < lim["min_freq_hz"] or sum_hz + half_span_hz > lim["max_freq_hz"]:
        return (f"f2-f1 = {format_freq(diff_hz)} or f1+f2 = {format_freq(sum_hz)} outside the analyzer's "
                f"{format_freq(lim['min_freq_hz'])} to {format_freq(lim['max_freq_hz'])}")
    try:
        out.loss_db(diff_hz)
        out.loss_db(sum_hz)
    except InputError as exc:
        return f"no output loss there: {exc}"
    return None


def read_second_order(analyzer, point: PlannedPoint, noise_offset_hz: float) -> SecondOrderReadings:
    diff_hz, sum_hz = point.f2_hz - point.f1_hz, point.f1_hz + point.f2_hz
    diff = analyzer.read_markers(diff_hz, [diff_hz, diff_hz + noise_offset_hz])
    total = analyzer.read_markers(sum_hz, [sum_hz, sum_hz + noise_offset_hz])
    return SecondOrderReadings(diff.powers_dbm[0], total.powers_dbm[0], diff.powers_dbm[1], total.powers_dbm[1],
                               diff.sweep_time_s + total.sweep_time_s)
