"""IM3 products too close to the noise floor read again at a narrower RBW, within the plan's
time budget, rather than left as bounds.

Narrowing the RBW by a factor F lowers the noise in it by 10 log10(F) dB, and a product (a line)
keeps its level; the sweep takes F^2 longer at a fixed span, F longer with the span kept at ten
RBWs (k * span / RBW^2). The narrow read is the plan's IM3 read with RBW, VBW and span divided by
F, so the noise markers stay the same fraction of the span away, and (unless the plan fixes it)
the attenuation at the optimum for its lower noise: otherwise the analyzer's own IM3, which does
not fall with the RBW, would be what limits the product. The attenuation spends a third of the
noise gained (its optimum rises 1 dB per 3 dB less noise), so the step is chosen by the noise
the narrow setup predicts. F is the smallest step of the 1-2-5 sequence (common RBW steps of swept analyzers, from memory) that gives the weaker product
IM3_OVER_NOISE_MIN_DB + MARGIN_DB over its noise, held to the plan's `[analyzer]
narrowing_budget_s` for all the point's narrow sweeps together; a factor the budget cannot pay is
cut to what it can (the product then gets what is possible, and the analysis still flags what
stays too close). The sweep time stored is that of every narrow sweep made.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace

from tonebench.analysis.sweep_fit import IM3_OVER_NOISE_MIN_DB
from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.plan.points import PlannedPoint
from tonebench.run.readings import Readings, read_im3

# Aimed over the minimum: a noise marker is one sample of noise, and scatters by several dB.
MARGIN_DB = 3.0
# With an accuracy target the noise is the mean of several markers (read_settings.NOISE_MARKERS),
# which scatters about a third as much: a read is aimed this far over the target. Measured on the
# sample accuracy plan (DEVELOPERS.md): 3 dB cost 1.5 x the physical bound, 1 dB 1.2 x.
TARGET_MARGIN_DB = 1.0
MAX_READS = 3  # narrow reads of one point, each from the last one's signal-to-noise
MIN_RBW_HZ = 1.0  # the narrowest RBW of common swept analyzers (from memory)
RBW_STEPS = (1.0, 2.0, 5.0)  # mantissas of the 1-2-5 sequence


@dataclass(frozen=True)
class NarrowRead:
    rbw_hz: float  # the last (narrowest) read, whose values the point keeps
    sweep_time_s: float  # every narrow sweep of the point
    snr_before_db: float  # the weaker product's over its noise at the plan's RBW


def snr_db(readings: Readings) -> float:
    """The weaker IM3 product's level over its own noise marker (dB)."""
    return min(readings.lower_dbm - readings.noise_lower_dbm, readings.upper_dbm - readings.noise_upper_dbm)


def step_down_hz(rbw_hz: float) -> float:
    """The largest 1-2-5 step at or below rbw_hz."""
    decade = 10.0 ** math.floor(math.log10(rbw_hz) + 1e-9)
    return max(decade * m for m in RBW_STEPS if decade * m <= rbw_hz * (1 + 1e-9))


def narrow_rbw_hz(current: AnalyzerSetup, snr_now_db: float, budget_s: float, sweep_time_s,
                  setup_at: Callable[[float], AnalyzerSetup], target_db: float | None = None) -> float | None:
    """The RBW to read the products again at, or None (no need, or no narrower step affordable):
    the widest 1-2-5 step under current.rbw_hz whose noise, with the attenuation setup_at gives it,
    lies far enough under the present one, else the narrowest the budget pays for two sweeps.
    sweep_time_s(setup) is the analyzer's predicted sweep time. With target_db (the plan's accuracy
    target) a read under it is read again, aimed TARGET_MARGIN_DB over it."""
    if target_db is None:
        needed_db = aim_db = IM3_OVER_NOISE_MIN_DB + MARGIN_DB
    else:
        needed_db, aim_db = target_db, target_db + TARGET_MARGIN_DB
    if snr_now_db >= needed_db:
        return None
    wanted_db = aim_db - snr_now_db
    best = None
    rbw_hz = step_down_hz(current.rbw_hz * (1 - 1e-6))
    while rbw_hz >= MIN_RBW_HZ * (1 - 1e-9):
        candidate = setup_at(rbw_hz)
        if 2 * sweep_time_s(candidate) > budget_s:
            break  # narrower only costs more
        gain_db = 10 * math.log10(current.rbw_hz / rbw_hz) - (candidate.atten_db - current.atten_db)
        if gain_db > 0:
            best = rbw_hz
            if gain_db >= wanted_db:
                break
        rbw_hz = step_down_hz(rbw_hz * (1 - 1e-6))
    return best


def narrowed(setup: AnalyzerSetup, rbw_hz: float) -> AnalyzerSetup:
    factor = setup.rbw_hz / rbw_hz
    return replace(setup, rbw_hz=rbw_hz, vbw_hz=setup.vbw_hz / factor, span_hz=setup.span_hz / factor)


def read_narrow(analyzer, point: PlannedPoint, setup: AnalyzerSetup, readings: Readings,
                noise_offsets_hz: tuple[float, ...],
                budget_s: float, setup_at: Callable[[float], AnalyzerSetup],
                target_db: float | None = None) -> tuple[Readings, NarrowRead | None]:
    """The readings with their IM3 products (and noise markers) read again narrower where the
    weaker is under IM3_OVER_NOISE_MIN_DB over its noise, as long as the budget lasts (a read that
    still falls short, its noise marker being one noisy sample, is followed by a narrower one);
    else as they were. setup_at(rbw_hz) is the narrow read's setup: the attenuation optimum
    moves with the noise (run/attenuation_choice.py). The analyzer is left at `setup`."""
    before_db, spent_s, read = snr_db(readings), 0.0, None
    current = setup
    for _ in range(MAX_READS):
        rbw_hz = narrow_rbw_hz(current, snr_db(readings), budget_s - spent_s, analyzer.predicted_sweep_time_s,
                               setup_at, target_db)
        if rbw_hz is None:
            break
        current = setup_at(rbw_hz)
        analyzer.apply(current)
        lower, upper = read_im3(analyzer, point, tuple(off * rbw_hz / setup.rbw_hz for off in noise_offsets_hz))
        spent_s += lower.sweep_time_s + upper.sweep_time_s
        read = NarrowRead(rbw_hz, spent_s, before_db)
        readings = replace(readings, lower_dbm=lower.powers_dbm[0], upper_dbm=upper.powers_dbm[0],
                           noise_lower_dbm=lower.powers_dbm[1], noise_upper_dbm=upper.powers_dbm[1],
                           overload=readings.overload or lower.overload or upper.overload)
    if read is not None:
        analyzer.apply(setup)
    return readings, read
