"""A run of a mixer plan ([mixer], plan/frequency_plan.py): the LO set and on before each point's
tones, the analyzer reading at the IF, the output losses taken at the IF, the frequency plan
checked before anything is switched on, and predicted spurs said as events.

The tones keep their RF frequencies (sources, input losses, IIP3 referred to the RF input);
every analyzer read and output loss uses the point's IF view (`at_if`): the same point with its
centre and spacing moved to the IF. The move is affine (f -> f - f_LO, f_LO - f or f + f_LO), so
the view's f1, f2, 2f1-f2 and 2f2-f1 are exactly the IF of the RF ones, in RF naming (with
high-side injection the view's spacing is negative: the order is inverted).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

from tonebench.config.mixer_settings import MixerSettings
from tonebench.errors import InputError, LimitError
from tonebench.instruments.source import SignalSource
from tonebench.plan.frequency_plan import (
    check_frequency_plan,
    check_lo_power,
    lo_hz_for,
    predicted_spurs,
)
from tonebench.plan.limits import analyzer_limit_dbm, predicted_analyzer_input_dbm
from tonebench.plan.points import PlannedPoint
from tonebench.planes import arithmetic
from tonebench.planes.arithmetic import TWO_EQUAL_TONES_DB
from tonebench.units import format_freq


def at_if(mixer: MixerSettings, point: PlannedPoint) -> PlannedPoint:
    """The point as the analyzer sees it: centre and spacing at the IF (see the module docstring)."""
    lo_hz = lo_hz_for(mixer, point.center_hz)
    if mixer.output == "sum":
        return replace(point, center_hz=point.center_hz + lo_hz)
    if mixer.injection == "high":
        return replace(point, center_hz=lo_hz - point.center_hz, spacing_hz=-point.spacing_hz)
    return replace(point, center_hz=point.center_hz - lo_hz)


def check_mixer_plan(points: list[PlannedPoint], plan_settings, bench_settings, ranges, out_table,
                     origin: str) -> None:
    """Before the bench is touched: a [mixer] plan needs an lo source, its LO power within the
    bench limit, and every IF frequency within the analyzer's and the output calibration's range."""
    mixer = plan_settings.mixer
    if mixer is None:
        return
    check_lo_power(mixer, bench_settings.limits.max_lo_dbm if bench_settings.has_lo else None, origin)
    if plan_settings.sweep.second_order:
        raise InputError(f"{origin}: [sweep] second_order with a [mixer] table: second-order products at the IF "
                         "are not measured yet; leave second_order out")
    check_frequency_plan(mixer, [(p.f1_hz, p.f2_hz) for p in points], plan_settings.analyzer.effective_span_hz,
                         ranges, out_table, origin)
    if out_table is not None:
        check_analyzer_input_at_if(points, mixer, bench_settings.limits, out_table, origin)


def check_analyzer_input_at_if(points: list[PlannedPoint], mixer: MixerSettings, limits, out_table,
                               origin: str) -> None:
    """The analyzer input predicted with the output loss at the IF, where the tones reach it
    (the common check, plan/limits.py, takes the loss at the RF tone frequency; both must pass).
    The analyzer's own damage level is checked there; here the bench limit."""
    for point in points:
        view = at_if(mixer, point)
        tones = ((point.tone_dbm, view.f1_hz), (point.tone_dbm, view.f2_hz))
        analyzer_dbm = predicted_analyzer_input_dbm(tones, limits.expected_gain_db, out_table)
        if analyzer_dbm > limits.max_analyzer_input_dbm + 1e-9:
            raise InputError(
                f"{origin}: point {point.name} would put {analyzer_dbm:.2f} dBm into the analyzer at the IF "
                f"(expected gain {limits.expected_gain_db:.1f} dB); the limit max_analyzer_input_dbm is "
                f"{limits.max_analyzer_input_dbm:.2f} dBm")


def tighten_power_guards(instruments, points: list[PlannedPoint], mixer: MixerSettings | None, limits,
                         offsets, damage_dbm: float | None) -> None:
    """On a mixer plan, each tone source's run-time power guard (plan/limits.py power_guard, which
    takes the output loss at the RF tone) also predicts the analyzer input with the smallest output
    loss at any of the plan's IF tone frequencies: the tones reach the analyzer at the IF, and the
    smallest loss is the worst case whatever the LO of the point. Called right after connecting,
    before any power command."""
    if mixer is None or offsets is None:
        return
    limit_dbm = analyzer_limit_dbm(limits, damage_dbm)
    if_loss_db = min(min(offsets["out"].loss_db(float(view.f1_hz)), offsets["out"].loss_db(float(view.f2_hz)))
                     for view in (at_if(mixer, point) for point in points))
    paths = {"source1": "in1", "source2": "in2"}

    def at_if_guard(label: str, freq_hz: float, power_dbm: float) -> None:
        tone_dbm = arithmetic.tone_at_plane_dbm(power_dbm, offsets[paths[label]].loss_db(freq_hz))
        analyzer_dbm = arithmetic.analyzer_input_dbm(tone_dbm + TWO_EQUAL_TONES_DB + limits.expected_gain_db,
                                                     if_loss_db)
        if analyzer_dbm > limit_dbm + 1e-9:
            raise LimitError(f"{label}: {power_dbm:.2f} dBm at {format_freq(freq_hz)} would put {analyzer_dbm:.2f} dBm "
                             f"into the analyzer at the IF (expected gain {limits.expected_gain_db:.1f} dB); the limit "
                             f"is {limit_dbm:.2f} dBm")

    for source in instruments.sources():
        source.power_guard = _both(source.power_guard, at_if_guard)


def _both(first, second):
    def guard(label: str, freq_hz: float, power_dbm: float) -> None:
        if first is not None:
            first(label, freq_hz, power_dbm)
        second(label, freq_hz, power_dbm)

    return guard


@dataclass
class MixerDrive:
    """The sequencer's part of a mixer run: the LO, and where the analyzer reads."""

    mixer: MixerSettings
    lo: SignalSource
    rbw_hz: float
    log: object  # the run log (event(level, kind, message, details))

    def __post_init__(self) -> None:
        self._spurs_said: set[tuple[float, float]] = set()

    def set_lo(self, point: PlannedPoint) -> None:
        """LO at the point's frequency and power (the point's lo_dbm when the plan steps it, else
        the plan's lo_dbm; only changes are sent), then on."""
        lo_dbm = self.mixer.lo_dbm if point.lo_dbm is None else point.lo_dbm
        self.lo.set_tone(lo_hz_for(self.mixer, point.center_hz), lo_dbm)
        if not self.lo.wanted.rf_on:
            self.lo.rf_on()
        self._say_spurs(point)

    def at_if(self, point: PlannedPoint) -> PlannedPoint:
        return at_if(self.mixer, point)

    def _say_spurs(self, point: PlannedPoint) -> None:
        """One warning event per (f1, f2) for each spur predicted near an IM3 at the IF, with m, n."""
        pair = (point.f1_hz, point.f2_hz)
        if pair in self._spurs_said:
            return
        self._spurs_said.add(pair)
        for spur in predicted_spurs(self.mixer, point.f1_hz, point.f2_hz, self.rbw_hz):
            sign = "+" if spur.n > 0 else "-"
            self.log.event(
                "warning", "mixer-spur",
                f"spur {spur.m}*LO {sign} {abs(spur.n)}*{spur.tone} at {format_freq(spur.freq_hz)} lies "
                f"{spur.offset_hz:+.0f} Hz from the {spur.near} IM3 at the IF (RF {format_freq(point.f1_hz)}/"
                f"{format_freq(point.f2_hz)}): that IM3 reading may hold the spur",
                {"m": spur.m, "n": spur.n, "tone": spur.tone, "near": spur.near, "freq_hz": spur.freq_hz,
                 "offset_hz": spur.offset_hz, "f1_hz": point.f1_hz, "f2_hz": point.f2_hz})
