"""Measuring path losses and the system residual on an open bench.

- Input paths: the power meter at the DUT input plane; one source on at a time (a broadband
  sensor sees total power), stepped over the frequencies: loss = source setting - meter reading.
- Output path: a thru in place of the DUT; source 1 alone at each frequency, its power at the
  DUT input plane known from the input calibration; loss = that power - analyzer reading. The
  analyzer's own level error is taken into the output loss, as it should be for readings later
  referred through it.
- System residual: the thru in place, both tones stepped in power, the IM3 products read and
  referred back to the DUT input plane, at the plan's attenuation and 10 dB away from it.

Every procedure leaves RF off however it ends (read back, retried), waits on *OPC? (inside the role
drivers), and acts on a Ctrl-C or SIGTERM between steps even if its exception was swallowed.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, replace

import numpy as np

from tonebench.errors import InputError, InstrumentError
from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.instruments.open_bench import OpenBench
from tonebench.instruments.rf_guard import raise_if_stopping
from tonebench.plan.limits import check_source_power
from tonebench.planes import arithmetic
from tonebench.planes.loss_table import LossTable
from tonebench.units import format_freq

# An output-path reading must clear its noise marker by this much to be a loss, not noise.
MIN_TONE_SNR_DB = 30.0
ATTEN_STEP_DB = 10.0  # design section 4: the attenuation step that separates analyzer-made IM3


def calibration_freqs_hz(tone_pairs_hz: Iterable[tuple[float, float]], step_hz: float | None = None) -> np.ndarray:
    """Every frequency a plan reads on any path (both tones and both IM3 products), sorted; with
    step_hz also a uniform grid from the lowest to the highest of them."""
    freqs = set()
    for f1_hz, f2_hz in tone_pairs_hz:
        freqs.update((f1_hz, f2_hz, 2.0 * f1_hz - f2_hz, 2.0 * f2_hz - f1_hz))
    grid = np.array(sorted(freqs), dtype=float)
    if step_hz is not None and grid.size > 1:
        if step_hz <= 0:
            raise InputError(f"step {format_freq(step_hz)}: the calibration grid step must be > 0 Hz")
        extra = np.arange(grid[0], grid[-1], step_hz)
        grid = np.unique(np.concatenate([grid, extra]))
    return grid


@dataclass(frozen=True)
class InputPaths:
    freqs_hz: np.ndarray
    in1_loss_db: np.ndarray
    in2_loss_db: np.ndarray
    meter_dbm: dict[str, list[float]]  # readings per path, for the set's notes and tests


def measure_input_paths(bench: OpenBench, freqs_hz: Sequence[float], source_dbm: float,
                        on_step: Callable[[], None] = lambda: None) -> InputPaths:
    """Both input paths with the power meter at the DUT input plane; source_dbm is each source's
    setting. on_step is called after each reading (2 per frequency)."""
    meter = bench.power_meter
    if meter is None:
        raise InputError("measuring the input paths needs a power_meter instrument in the bench file")
    losses: dict[str, list[float]] = {"in1": [], "in2": []}
    readings: dict[str, list[float]] = {"in1": [], "in2": []}
    try:
        bench.rf_off_all()
        meter.prepare()
        for index, path in ((1, "in1"), (2, "in2")):
            source = bench.sources()[index - 1]
            check_source_power(bench.source_ranges[index - 1], source_dbm, f"input calibration of {path}")
            for i, freq_hz in enumerate(freqs_hz):
                raise_if_stopping()
                source.set_tone(float(freq_hz), source_dbm)
                if i == 0:
                    source.rf_on()
                reading_dbm = meter.read_power_dbm(float(freq_hz))
                readings[path].append(reading_dbm)
                losses[path].append(source_dbm - reading_dbm)
                on_step()
            source.rf_off()
    finally:
        bench.switch_rf_off()  # read back, retried; never raises over the error in flight
    return InputPaths(np.asarray(freqs_hz, dtype=float), np.array(losses["in1"]), np.array(losses["in2"]), readings)


def measure_output_path(bench: OpenBench, in1: LossTable, freqs_hz: Sequence[float], source_dbm: float,
                        setup: AnalyzerSetup, noise_offset_hz: float,
                        on_step: Callable[[], None] = lambda: None) -> np.ndarray:
    """Output loss (dB) at each frequency, through a thru, from source 1 and the input calibration;
    on_step after each frequency."""
    analyzer = bench.analyzer
    losses = []
    try:
        bench.rf_off_all()
        analyzer.prepare()
        analyzer.apply(setup)
        check_source_power(bench.source_ranges[0], source_dbm, "output calibration")
        for i, freq_hz in enumerate(freqs_hz):
            raise_if_stopping()
            freq_hz = float(freq_hz)
            plane_dbm = arithmetic.tone_at_plane_dbm(source_dbm, in1.loss_db(freq_hz))
            bench.source1.set_tone(freq_hz, source_dbm)
            if i == 0:
                bench.source1.rf_on()
            reading = analyzer.read_markers(freq_hz, [freq_hz, freq_hz + noise_offset_hz])
            tone_dbm, noise_dbm = reading.powers_dbm
            if reading.overload:
                raise InstrumentError(
                    f"output calibration at {format_freq(freq_hz)}: the analyzer is overloaded; lower the level or raise "
                    "the plan's attenuation"
                )
            if tone_dbm - noise_dbm < MIN_TONE_SNR_DB:
                raise InstrumentError(
                    f"output calibration at {format_freq(freq_hz)}: the tone is only {tone_dbm - noise_dbm:.1f} dB over the "
                    "noise; is the thru in place and the output path connected?"
                )
            losses.append(plane_dbm - tone_dbm)
            on_step()
    finally:
        bench.switch_rf_off()  # read back, retried; never raises over the error in flight
    return np.array(losses)


@dataclass(frozen=True)
class ResidualSweep:
    """One thru sweep at one attenuation, referred to the DUT input plane (dBm per point)."""

    atten_db: float
    p1_dbm: np.ndarray
    p2_dbm: np.ndarray
    im3_lower_dbm: np.ndarray
    im3_upper_dbm: np.ndarray
    noise_lower_dbm: np.ndarray
    noise_upper_dbm: np.ndarray
    overload: np.ndarray


def stepped_atten_db(base_atten_db: float, max_atten_db: float) -> float:
    """10 dB more attenuation, or 10 dB less where the analyzer has no more."""
    return base_atten_db + ATTEN_STEP_DB if base_atten_db + ATTEN_STEP_DB <= max_atten_db else base_atten_db - ATTEN_STEP_DB


def measure_residual_sweeps(bench: OpenBench, tables: dict[str, LossTable], center_hz: float, spacing_hz: float,
                            tone_levels_dbm: Sequence[float], setup: AnalyzerSetup, noise_offset_hz: float,
                            attens_db: Sequence[float], on_step: Callable[[], None] = lambda: None) -> list[ResidualSweep]:
    """Thru in place: both tones at each level (dBm at the DUT input plane, open loop through the
    set's input losses), IM3 and its noise floor read at each attenuation; on_step after each level."""
    f1_hz, f2_hz = center_hz - spacing_hz / 2.0, center_hz + spacing_hz / 2.0
    lower_hz, upper_hz = 2.0 * f1_hz - f2_hz, 2.0 * f2_hz - f1_hz
    in1_db, in2_db = tables["in1"].loss_db(f1_hz), tables["in2"].loss_db(f2_hz)
    out_lower_db, out_upper_db = tables["out"].loss_db(lower_hz), tables["out"].loss_db(upper_hz)
    analyzer = bench.analyzer
    sweeps = []
    try:
        analyzer.prepare()
        rf_on = False
        for atten_db in attens_db:
            analyzer.apply(replace(setup, atten_db=atten_db))
            columns: dict[str, list] = {k: [] for k in ("p1", "p2", "lower", "upper", "noise_lower", "noise_upper", "overload")}
            for level_dbm in tone_levels_dbm:
                raise_if_stopping()
                settings = (arithmetic.source_setting_dbm(level_dbm, in1_db), arithmetic.source_setting_dbm(level_dbm, in2_db))
                for source, source_range, setting_dbm in zip(bench.sources(), bench.source_ranges, settings):
                    check_source_power(source_range, setting_dbm, f"system residual at {level_dbm:.2f} dBm")
                bench.source1.set_tone(f1_hz, settings[0])
                bench.source2.set_tone(f2_hz, settings[1])
                if not rf_on:
                    bench.rf_on()
                    rf_on = True
                lower = analyzer.read_markers(lower_hz, [lower_hz, lower_hz - noise_offset_hz])
                upper = analyzer.read_markers(upper_hz, [upper_hz, upper_hz + noise_offset_hz])
                columns["p1"].append(arithmetic.tone_at_plane_dbm(settings[0], in1_db))
                columns["p2"].append(arithmetic.tone_at_plane_dbm(settings[1], in2_db))
                columns["lower"].append(arithmetic.dut_output_dbm(lower.powers_dbm[0], out_lower_db))
                columns["noise_lower"].append(arithmetic.dut_output_dbm(lower.powers_dbm[1], out_lower_db))
                columns["upper"].append(arithmetic.dut_output_dbm(upper.powers_dbm[0], out_upper_db))
                columns["noise_upper"].append(arithmetic.dut_output_dbm(upper.powers_dbm[1], out_upper_db))
                columns["overload"].append(lower.overload or upper.overload)
                on_step()
            sweeps.append(ResidualSweep(
                atten_db, *(np.array(columns[k], dtype=float) for k in ("p1", "p2", "lower", "upper", "noise_lower", "noise_upper")),
                np.array(columns["overload"], dtype=bool),
            ))
    finally:
        bench.switch_rf_off()  # read back, retried; never raises over the error in flight
    return sweeps
