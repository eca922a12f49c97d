"""The frequency plan of a mixer plan ([mixer], config/mixer_settings.py): the LO for each point,
the four output frequencies at the IF, their checks against the bench, and the spurious
products m*LO +/- n*RF that fall near an IM3 frequency at the IF.

Names keep their RF meaning: "lower" is the product of 2f1 - f2, "upper" of 2f2 - f1, wherever
they land at the IF. With high-side injection and the difference output the IF is f_LO - f, so
the order inverts: the lower product lands above both tones (`inverted`). IIP3 stays referred to
the RF input (tone powers at the DUT input plane); OIP3 to the IF output (readings plus the
output loss at the IF); the conversion gain stands where an amplifier's gain does.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass

from tonebench.config.mixer_settings import MixerSettings
from tonebench.errors import InputError
from tonebench.plan.limits import FreqNeed, FreqRange, check_frequency_needs, read_need
from tonebench.planes.loss_table import LossTable
from tonebench.units import format_freq


@dataclass(frozen=True)
class IfFrequencies:
    """One point's frequencies: its LO, and at the IF the tones and the IM3 products (RF names)."""

    lo_hz: float
    f1_hz: float
    f2_hz: float
    lower_hz: float
    upper_hz: float
    inverted: bool  # lower and upper swap sides at the IF (high-side injection, difference output)

    def as_dict(self) -> dict[str, float]:
        return {"f1": self.f1_hz, "f2": self.f2_hz, "lower": self.lower_hz, "upper": self.upper_hz}


def lo_hz_for(mixer: MixerSettings, center_hz: float) -> float:
    """The LO frequency of a point at this RF centre: lo_hz, or the one giving if_hz at the centre."""
    if mixer.lo_hz is not None:
        return mixer.lo_hz
    if mixer.output == "sum":
        return mixer.if_hz - center_hz
    return center_hz - mixer.if_hz if mixer.injection == "low" else center_hz + mixer.if_hz


def to_if_hz(mixer: MixerSettings, lo_hz: float, rf_hz: float) -> float:
    return abs(rf_hz - lo_hz) if mixer.output == "difference" else rf_hz + lo_hz


def if_frequencies(mixer: MixerSettings, f1_hz: float, f2_hz: float, origin: str = "[mixer]") -> IfFrequencies:
    """The point's frequencies at the IF; InputError (one line) when the LO is not on the side
    `injection` says, or at or below 0 Hz."""
    lower_rf_hz, upper_rf_hz = 2.0 * f1_hz - f2_hz, 2.0 * f2_hz - f1_hz
    lo_hz = lo_hz_for(mixer, 0.5 * (f1_hz + f2_hz))
    if lo_hz <= 0.0:
        raise InputError(f"{origin}: the LO would sit at {lo_hz:.12g} Hz for RF {format_freq(f1_hz)}..{format_freq(f2_hz)};"
                         " if_hz must exceed the RF for the sum output")
    low_ok, high_ok = lo_hz < lower_rf_hz, lo_hz > upper_rf_hz
    if (mixer.injection == "low" and not low_ok) or (mixer.injection == "high" and not high_ok):
        side = "below" if mixer.injection == "low" else "above"
        raise InputError(
            f"{origin}: injection = \"{mixer.injection}\" needs the LO {side} every RF product "
            f"({format_freq(lower_rf_hz)}..{format_freq(upper_rf_hz)}); the LO is at {format_freq(lo_hz)} "
            f"(allowed: \"low\" with the LO below, \"high\" with it above)")
    inverted = mixer.output == "difference" and mixer.injection == "high"
    return IfFrequencies(lo_hz, to_if_hz(mixer, lo_hz, f1_hz), to_if_hz(mixer, lo_hz, f2_hz),
                         to_if_hz(mixer, lo_hz, lower_rf_hz), to_if_hz(mixer, lo_hz, upper_rf_hz), inverted)


def check_frequency_plan(mixer: MixerSettings, pairs: Iterable[tuple[float, float]], span_hz: float,
                         ranges: Mapping[str, FreqRange], out_table: LossTable | None, origin: str) -> None:
    """Every (f1, f2): its IF frequencies read over the span within the analyzer's range, the
    output calibration covering them, and the LO within the lo source's range (one line if not)."""
    for f1_hz, f2_hz in dict.fromkeys(pairs):
        freqs = if_frequencies(mixer, f1_hz, f2_hz, origin)
        at = f"RF {format_freq(f1_hz)}/{format_freq(f2_hz)}"
        needs = [FreqNeed("lo", f"{at} LO", freqs.lo_hz, freqs.lo_hz)]
        needs += [read_need(f"{at} {name} at the IF", freq_hz, span_hz) for name, freq_hz in freqs.as_dict().items()]
        check_frequency_needs(needs, ranges, origin)
        if out_table is not None:
            for name, freq_hz in freqs.as_dict().items():
                try:
                    out_table.loss_db(float(freq_hz))
                except InputError as exc:
                    raise InputError(f"{origin}: {at} {name} at the IF ({format_freq(freq_hz)}): {exc}") from None


def check_lo_power(mixer: MixerSettings, max_lo_dbm: float | None, origin: str) -> None:
    """Every LO power of the plan (lo_dbm, or each of lo_levels_dbm) against the bench limit,
    before anything is switched on."""
    if max_lo_dbm is None:
        raise InputError(f"{origin}: the plan has a [mixer] table but the bench has no lo source "
                         "(add [instruments.lo] and [limits] max_lo_dbm)")
    name = "lo_dbm" if mixer.lo_levels_dbm is None else "lo_levels_dbm level"
    for level_dbm in mixer.lo_levels():
        if level_dbm > max_lo_dbm + 1e-9:
            raise InputError(f"{origin}: [mixer] {name} {level_dbm:.2f} dBm is above the bench limit "
                             f"max_lo_dbm {max_lo_dbm:.2f} dBm")


# --- spurious products ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Spur:
    """A product m*LO + n*f (f one tone, at the RF) landing within the window of an IM3 at the IF."""

    m: int
    n: int
    tone: str  # "f1" or "f2"
    freq_hz: float  # where it lands at the IF
    near: str  # "lower" or "upper"
    offset_hz: float  # from that IM3 frequency


def predicted_spurs(mixer: MixerSettings, f1_hz: float, f2_hz: float, rbw_hz: float) -> list[Spur]:
    """Products |m*f_LO + n*f_tone| with 1 <= |m|, |n| <= spur_max_order, other than the wanted
    conversion (|m| = |n| = 1), that land within spur_window_rbw RBWs of an IM3 frequency at the IF."""
    freqs = if_frequencies(mixer, f1_hz, f2_hz)
    window_hz = mixer.spur_window_rbw * rbw_hz
    order = mixer.spur_max_order
    spurs = []
    for tone, rf_hz in (("f1", f1_hz), ("f2", f2_hz)):
        for m in range(-order, order + 1):
            for n in range(1, order + 1):  # n > 0: -(m, n) gives the same frequency
                if m == 0 or (abs(m) == 1 and n == 1):
                    continue
                spur_hz = abs(m * freqs.lo_hz + n * rf_hz)
                for near, im3_hz in (("lower", freqs.lower_hz), ("upper", freqs.upper_hz)):
                    if abs(spur_hz - im3_hz) <= window_hz:
                        spurs.append(Spur(m, n, tone, spur_hz, near, spur_hz - im3_hz))
    return spurs
