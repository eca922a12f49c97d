"""Virtual clock of the simulated bench, and the signal chain through its parts (the instruments'
state in instrument_state.py, the parts' true values in truth.py).

Two sources -> their input paths -> DUT -> output path -> analyzer. The clock only moves forward
by analyzer sweeps and by waiting for a source to settle (its *OPC?), never by sleeping. A
source's new setting is in force from its settle deadline on (design section 5): a sweep that
starts earlier still sees the old one.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, replace

import numpy as np

from tonebench.sim import detector as sim_detector
from tonebench.sim import memory, phase_noise, physics
from tonebench.sim import mixer as sim_mixer
from tonebench.sim.analyzer_im2 import add_analyzer_im2
from tonebench.sim.chamber import SimChamber
from tonebench.sim.fet_stage import FetBias, FetStage
from tonebench.sim.instrument_state import AnalyzerState, PowerMeterState, SourceChannel, SourceSetting
from tonebench.sim.scenario import Scenario
from tonebench.sim.supply import SimSupply
from tonebench.sim.truth import BenchTruth
from tonebench.units import dbm_to_vpeak, dbm_to_watt, vpeak_to_dbm, watt_to_dbm

@dataclass(frozen=True)
class AnalyzerInput:
    """Spectral lines at the analyzer input: one per bin of the DUT simulation (zero where none)."""

    freq_hz: np.ndarray
    amp_v: np.ndarray  # complex peak phasors, V


def input_plane_tones(truth: BenchTruth, settings: tuple[SourceSetting, SourceSetting]) -> list[tuple[float, float]]:
    """(freq_hz, power_dbm) of each source that is on, at the DUT input plane (through its input path)."""
    return [(setting.freq_hz, setting.power_dbm - truth.true_loss_db(path, setting.freq_hz))
            for path, setting in zip(("in1", "in2"), settings) if setting.rf_on]


def analyzer_input(scenario: Scenario, truth: BenchTruth, settings: tuple[SourceSetting, SourceSetting],
                   atten_db: float, thru: bool = False, stage: FetStage | None = None,
                   lo: SourceSetting | None = None) -> AnalyzerInput:
    """Lines reaching the analyzer for these source settings, its mixer's own IM3 referred to its input included.

    thru=True puts a 0 dB thru in place of the DUT: what sits at the DUT input plane (tones and the
    sources' residual IM3) reaches the output path unchanged. stage: a biased FET stage in place of
    the scenario's memoryless DUT. lo: the LO source's setting, for a mixer scenario (sim/mixer.py):
    the products then sit at the IF, and nothing comes out with the LO off.
    """
    tones = [(freq_hz, float(dbm_to_vpeak(dbm))) for freq_hz, dbm in input_plane_tones(truth, settings)]
    bins = physics.SIM_POINTS // 2 + 1
    if not tones:
        return AnalyzerInput(np.zeros(bins), np.zeros(bins, dtype=complex))
    tones.sort()
    two_tone = len(tones) == 2 and tones[1][0] > tones[0][0]
    if len(tones) == 2 and not two_tone:
        tones = [(tones[0][0], tones[0][1] + tones[1][1])]  # same frequency: one tone
    f_low_hz, low_v = tones[0]
    f_high_hz, high_v = tones[-1] if two_tone else (f_low_hz, 0.0)
    phase_deg = scenario.coherent_phase_deg
    residual_low_v = residual_high_v = 0j
    if two_tone:
        low_dbm, high_dbm = physics.source_residual_im3_dbm(
            float(vpeak_to_dbm(low_v)), float(vpeak_to_dbm(high_v)), scenario.sources.system_ip3_dbm)
        residual_low_v = physics.im3_phasor_v(low_dbm, low_v, high_v, True, phase_deg)
        residual_high_v = physics.im3_phasor_v(high_dbm, low_v, high_v, False, phase_deg)
    if thru:
        amp_v = np.zeros(bins, dtype=complex)
        for pq, value_v in (((1, 0), low_v), ((0, 1), high_v), ((2, -1), residual_low_v), ((-1, 2), residual_high_v)):
            amp_v[physics.product_bin(*pq)] += value_v
    elif scenario.mixer is not None:
        if lo is None or not lo.rf_on:  # an unpumped mixer converts nothing (LO leakage not modelled)
            return AnalyzerInput(np.zeros(bins), np.zeros(bins, dtype=complex))
        freq_hz, amp_v = sim_mixer.translated_spectrum(
            scenario.mixer, lo.freq_hz, lo.power_dbm - scenario.mixer.lo_loss_db, f_low_hz, f_high_hz,
            low_v, high_v, residual_low_v, residual_high_v)
    else:
        model = stage if stage is not None else truth.dut_model(0.5 * (f_low_hz + f_high_hz))
        amp_v = physics.dut_output_spectrum_v(model, low_v, high_v, residual_low_v, residual_high_v)
        if stage is None and two_tone:  # the memoryless DUT's baseband memory (off by default)
            amp_v = amp_v + memory.dut_memory_spectrum_v(scenario.dut, model.a3, f_high_hz - f_low_hz, low_v,
                                                         high_v, residual_low_v, residual_high_v)
    if thru or scenario.mixer is None:
        freq_hz = physics.bin_frequencies_hz(f_low_hz, f_high_hz - f_low_hz)
    keep = freq_hz > 0.0  # products folding through 0 Hz (spacing above f1) are not modelled
    if not two_tone:
        keep &= np.arange(bins) % physics.TONE_BIN == 0  # harmonics only
    amp_v = np.where(keep, amp_v, 0j)
    amp_v = amp_v * 10.0 ** (-truth.true_loss_db("out", np.where(keep, freq_hz, f_low_hz)) / 20.0)
    low_v, high_v = amp_v[physics.product_bin(1, 0)], amp_v[physics.product_bin(0, 1)]
    if two_tone and abs(low_v) > 0.0 and abs(high_v) > 0.0:  # an unbiased FET passes no tones
        mixer_low_dbm, mixer_high_dbm = physics.mixer_im3_dbm(
            float(vpeak_to_dbm(low_v)), float(vpeak_to_dbm(high_v)), atten_db, scenario.analyzer.mixer_toi_dbm)
        amp_v[physics.product_bin(2, -1)] += physics.im3_phasor_v(mixer_low_dbm, low_v, high_v, True, phase_deg)
        amp_v[physics.product_bin(-1, 2)] += physics.im3_phasor_v(mixer_high_dbm, low_v, high_v, False, phase_deg)
        add_analyzer_im2(amp_v, low_v, high_v, atten_db, scenario.analyzer.mixer_shi_dbm)
    return AnalyzerInput(freq_hz, amp_v)


def _total_dbm(amp_v: np.ndarray) -> float:
    total_w = float(np.sum(physics.vpeak_to_watt(amp_v)))
    return float(watt_to_dbm(total_w)) if total_w > 0.0 else -np.inf


class SimBench:
    """The whole simulated bench: two sources, paths, DUT, analyzer, one lock and one virtual clock.

    Sources are numbered 1 and 2. Every method expects the caller to hold `lock` when other
    threads (the instrument servers) may be running.
    """

    def __init__(self, scenario: Scenario):
        self.scenario = scenario
        self.lock = threading.RLock()
        self.clock_s = 0.0
        self.truth = BenchTruth(scenario)
        self.analyzer = AnalyzerState()
        # A mixer scenario adds its LO as source 3 (sim/mixer.py).
        indexes = (1, 2, sim_mixer.LO_SOURCE_INDEX) if scenario.mixer is not None else (1, 2)
        self._sources = {index: self._source_at_power_on() for index in indexes}
        self.command_log: list[tuple[float, str, str]] = []  # (clock_s, instrument, line)
        self.damage_log: list[tuple[float, float]] = []  # (clock_s, analyzer input dBm)
        self._rng = np.random.default_rng(scenario.seed)
        self.thru = scenario.thru
        self.power_meter = PowerMeterState()
        # Its own stream, so power meter reads do not shift the analyzer's noise sequence.
        self._meter_rng = np.random.default_rng((scenario.seed, 2))
        # Gate and drain supplies (one output each) of a FET scenario, by bench role.
        self.supplies: dict[str, SimSupply] = {}
        self.fet_bias: FetBias | None = None
        if scenario.fet is not None:
            self.supplies = {role: SimSupply(channel_count=1, current_noise_a=scenario.fet.current_noise_a,
                                             seed=(scenario.seed, 3 + number))
                             for number, role in enumerate(("gate", "drain"))}
            self.fet_bias = FetBias(scenario.fet, self.supplies["gate"], self.supplies["drain"])
        self.chamber: SimChamber | None = None
        if scenario.chamber is not None:
            self.chamber = SimChamber(scenario.chamber, lambda: self.clock_s)
            if self.fet_bias is not None:
                self.fet_bias.temp_of = self.chamber.device_temp_k

    def advance(self, seconds: float) -> None:
        """Let virtual time pass (a wait of the driver of a slow instrument, such as a chamber soak)."""
        with self.lock:
            self.clock_s += max(0.0, seconds)

    def set_thru(self, thru: bool) -> None:
        """Put a 0 dB thru in place of the DUT (True) or the DUT back (False): the operator's job on a real bench."""
        self.thru = bool(thru)

    # --- sources --------------------------------------------------------------------------------

    def _source_at_power_on(self) -> SourceChannel:
        setting = SourceSetting(power_dbm=max(-30.0, self.scenario.sources.min_power_dbm))
        return SourceChannel(commanded=setting, effective=setting)

    def source(self, index: int) -> SourceChannel:
        self._catch_up()
        return self._sources[index]

    def set_source(self, index: int, *, freq_hz: float | None = None, power_dbm: float | None = None,
                   rf_on: bool | None = None) -> None:
        """Command a change; it comes into force settle_time_s later on the virtual clock."""
        channel = self._sources[index]
        changes = {name: value for name, value in
                   (("freq_hz", freq_hz), ("power_dbm", power_dbm), ("rf_on", rf_on)) if value is not None}
        channel.commanded = replace(channel.commanded, **changes)
        channel.pending.append((self.clock_s + self.scenario.sources.settle_time_s, channel.commanded))

    def unsettle_source(self, index: int, level_error_db: float, time_constant_s: float) -> None:
        """From its last change on, the source's level is off by level_error_db, decaying with
        time_constant_s on the virtual clock; *OPC? does not wait for it (a fault to inject)."""
        channel = self._sources[index]
        start_s = channel.pending[-1][0] if channel.pending else self.clock_s
        channel.unsettled = (start_s, level_error_db, time_constant_s)

    def drift_source(self, index: int, drift_db_per_s: float) -> None:
        """From now on the source's level moves by drift_db_per_s on the virtual clock, while it
        reports its set power (a fault to inject)."""
        self._sources[index].drift = (self.clock_s, drift_db_per_s)

    def reset_source(self, index: int) -> None:
        """*RST: power-on setting, RF off (settling like any other change)."""
        default = self._source_at_power_on().commanded
        self.set_source(index, freq_hz=default.freq_hz, power_dbm=default.power_dbm, rf_on=default.rf_on)

    def settle_source(self, index: int) -> None:
        """*OPC? on a source: wait on the virtual clock until its last change is in force."""
        channel = self._sources[index]
        if channel.pending:
            self.clock_s = max(self.clock_s, channel.pending[-1][0])
        self._catch_up()

    def _catch_up(self) -> None:
        """Bring into force every change whose deadline the clock has passed."""
        changed = False
        for channel in self._sources.values():
            while channel.pending and channel.pending[0][0] <= self.clock_s:
                channel.effective = channel.pending.pop(0)[1]
                changed = True
        if changed:
            self._check_damage()

    def _effective_settings(self) -> tuple[SourceSetting, SourceSetting]:
        self._catch_up()
        return self._in_force(1), self._in_force(2)

    def _lo_in_force(self) -> SourceSetting | None:
        """The LO source's setting in force (mixer scenario), else None."""
        if sim_mixer.LO_SOURCE_INDEX not in self._sources:
            return None
        return self._in_force(sim_mixer.LO_SOURCE_INDEX)

    def _in_force(self, index: int) -> SourceSetting:
        """The setting in force with any level error of a source still settling."""
        channel = self._sources[index]
        error_db = channel.level_error_db(self.clock_s)
        if error_db == 0.0:
            return channel.effective
        return replace(channel.effective, power_dbm=channel.effective.power_dbm + error_db)

    # --- analyzer -------------------------------------------------------------------------------

    def reset_analyzer(self) -> None:
        """*RST: power-on settings, no trace; damage stays."""
        self.analyzer = AnalyzerState(damaged=self.analyzer.damaged)

    def fet_stage(self) -> FetStage | None:
        """The FET stage at the bias the supplies hold now (None without a FET scenario); its
        gain_db and iip3_dbm are the truth tests compare with."""
        return None if self.fet_bias is None else self.fet_bias.stage()

    def _input(self) -> AnalyzerInput:
        return analyzer_input(self.scenario, self.truth, self._effective_settings(), self.analyzer.atten_db, self.thru,
                              self.fet_stage(), self._lo_in_force())

    def input_power_dbm(self) -> float:
        """Total power now at the analyzer input connector (dBm)."""
        return _total_dbm(self._input().amp_v)

    def mixer_power_dbm(self) -> float:
        """Total power now at the analyzer's first mixer (dBm)."""
        return self.input_power_dbm() - self.analyzer.atten_db

    def overloaded(self) -> bool:
        """Live overload condition: mixer level above the scenario's limit."""
        return self.mixer_power_dbm() > self.scenario.analyzer.overload_mixer_dbm

    def _check_damage(self) -> None:
        input_dbm = _total_dbm(analyzer_input(self.scenario, self.truth, (self._in_force(1), self._in_force(2)),
                                              self.analyzer.atten_db, self.thru, self.fet_stage(),
                                              self._lo_in_force()).amp_v)
        if input_dbm > self.scenario.analyzer.damage_dbm:
            self.analyzer.damaged = True
            self.damage_log.append((self.clock_s, input_dbm))

    def sweep_time_s(self) -> float:
        state = self.analyzer
        return physics.sweep_time_s(state.span_hz, state.rbw_hz, self.scenario.analyzer.sweep_time_factor,
                                    state.vbw_hz)

    def trace_freq_hz(self) -> np.ndarray:
        state = self.analyzer
        return np.linspace(state.center_hz - state.span_hz / 2, state.center_hz + state.span_hz / 2,
                           self.scenario.analyzer.trace_points)

    def sweep(self) -> np.ndarray:
        """One sweep with the settings in force when it starts; returns the trace (dBm) and advances the clock."""
        state, settings = self.analyzer, self.scenario.analyzer
        lines = self._input()
        freq_hz = self.trace_freq_hz()
        dut = self.scenario.dut
        # A thru passes the thermal noise at its input: noise figure 0 dB, gain 0 dB.
        nf_db, gain_db = (0.0, 0.0) if self.thru else (dut.nf_db, self.truth.true_gain_db(freq_hz))
        stage = self.fet_stage()
        if stage is not None and not self.thru:
            gain_db = stage.gain_db()
        if self.scenario.mixer is not None and not self.thru:
            # Noise at the IF: the mixer's own noise figure and conversion gain (LO leakage aside).
            nf_db, gain_db = self.scenario.mixer.nf_db, self.scenario.mixer.conversion_gain_db
        arriving_dbm_per_hz = (physics.dut_output_noise_dbm_per_hz(nf_db, gain_db)
                               - self.truth.true_loss_db("out", freq_hz))
        noise_dbm_per_hz = physics.analyzer_noise_dbm_per_hz(settings.danl_dbm_per_hz, state.atten_db,
                                                             arriving_dbm_per_hz)
        noise_dbm_per_hz = phase_noise.with_reciprocal_mixing(noise_dbm_per_hz, freq_hz, lines.freq_hz,
                                                              physics.vpeak_to_watt(lines.amp_v), settings)
        if state.detector.is_default:
            power_w = physics.trace_power_w(freq_hz, lines.freq_hz, physics.vpeak_to_watt(lines.amp_v), state.rbw_hz,
                                            noise_dbm_per_hz,
                                            physics.video_averages(settings.noise_averages, state.rbw_hz, state.vbw_hz),
                                            self._rng)
        else:  # another detector, log averaging or a trace average (sim/detector.py)
            power_w = sim_detector.trace_reading_w(freq_hz, lines.freq_hz, physics.vpeak_to_watt(lines.amp_v),
                                                   state.rbw_hz, state.vbw_hz, noise_dbm_per_hz,
                                                   settings.noise_averages, state.detector, self._rng)
        compression_db = physics.overload_compression_db(_total_dbm(lines.amp_v) - state.atten_db,
                                                         settings.overload_mixer_dbm)
        state.trace_freq_hz = freq_hz
        state.trace_dbm = (watt_to_dbm(power_w) - compression_db
                           + physics.amplitude_error_db(freq_hz, settings.level_error_db, settings.flatness_db_per_ghz))
        state.overloaded = compression_db > 0.0
        self.clock_s += self.sweep_time_s() * state.detector.sweeps  # a trace average: that many sweeps
        return state.trace_dbm

    def marker_power_dbm(self) -> float:
        """Trace value (dBm) at the trace point nearest the marker; a continuous analyzer sweeps first."""
        state = self.analyzer
        if state.continuous:
            self.sweep()
        if state.trace_dbm is None:
            raise LookupError("no trace yet: start a sweep")
        return float(state.trace_dbm[np.argmin(np.abs(state.trace_freq_hz - state.marker_freq_hz))])

    # --- power meter ----------------------------------------------------------------------------

    def true_input_plane_dbm(self) -> float:
        """Total power (dBm) now at the DUT input plane from the sources in force; -inf with RF off."""
        tones = input_plane_tones(self.truth, self._effective_settings())
        total_w = sum(float(dbm_to_watt(dbm)) for _, dbm in tones)
        return float(watt_to_dbm(total_w)) if total_w > 0.0 else -np.inf

    def measure_power(self) -> float:
        """One power meter measurement (INITiate): the total power at the DUT input plane, as the
        meter reads it; advances the clock by the measurement time."""
        meter = self.scenario.power_meter
        tones = input_plane_tones(self.truth, self._effective_settings())
        total_w = sum(float(dbm_to_watt(dbm)) for _, dbm in tones) + float(dbm_to_watt(meter.noise_floor_dbm))
        # The sensor is corrected for the frequency it was told; the strongest tone decides the error.
        tone_hz = max(tones, key=lambda t: t[1])[0] if tones else self.power_meter.freq_hz
        error_db = (meter.accuracy_db + meter.sensor_slope_db_per_ghz * (tone_hz - self.power_meter.freq_hz) / 1e9
                    + float(self._meter_rng.normal(0.0, meter.reading_noise_db)))
        self.power_meter.reading_dbm = float(watt_to_dbm(total_w)) + error_db
        self.clock_s += meter.measure_time_s
        return self.power_meter.reading_dbm

    def reset_power_meter(self) -> None:
        self.power_meter = PowerMeterState()

    # --- bookkeeping ----------------------------------------------------------------------------

    def log(self, instrument: str, line: str) -> None:
        self.command_log.append((self.clock_s, instrument, line))
