"""The `[simulation]` table of a bench file: what the simulated bench's parts are like.

Defaults describe a 2.4 GHz low-noise amplifier bench. Values that vary with frequency are given
at `ref_freq_hz` with a slope in dB per GHz (linear in dB versus frequency).
"""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, Field, model_validator

from tonebench.sim.faults import FaultSpec
from tonebench.sim.mixer import MixerScenario

# A memoryless cubic compresses 1 dB at 10*log10((4/3) / (4/3 * (1 - 10^(-1/20)))) = 9.64 dB below
# its IIP3; a saturating stage can only make it compress earlier. Kept a little above that.
MIN_IIP3_ABOVE_P1DB_DB = 9.7


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class DutScenario(_Strict):
    """The device under test: a memoryless nonlinearity with gain, IIP3, compression and noise figure."""

    ref_freq_hz: float = Field(2.45e9, gt=0.0, le=1e12)
    gain_db: float = Field(15.0, ge=-60.0, le=60.0)
    gain_slope_db_per_ghz: float = Field(-2.0, ge=-20.0, le=20.0)
    iip3_dbm: float = Field(-2.0, ge=-60.0, le=100.0)
    iip3_slope_db_per_ghz: float = Field(1.0, ge=-20.0, le=20.0)
    # Input-referred at ref_freq_hz; elsewhere it keeps its distance below the IIP3.
    # None: the pure cubic, which compresses 1 dB about 9.6 dB below its IIP3.
    p1db_dbm: float | None = Field(None, ge=-80.0, le=90.0)
    # Second-order input intercept (products at f2-f1 and f1+f2), the same at every frequency.
    # The default puts them far below anything the third-order tests read.
    iip2_dbm: float = Field(60.0, ge=-40.0, le=200.0)
    # Fifth-order input intercept (the product at 3f1-2f2, slope 5), the same at every frequency.
    # Its term adds to the IM3 and biases the top points of a sweep low; None: no fifth-order term.
    iip5_dbm: float | None = Field(None, ge=-60.0, le=200.0)
    nf_db: float = Field(1.2, ge=0.0, le=40.0)
    # Baseband memory (sim/memory.py): the difference-frequency current into a bias network with
    # one pole re-mixes with the tones; strength is its share of the cubic's IM3 at 0 Hz spacing
    # (0: memoryless, every existing figure unchanged), the phase turns it against the cubic's.
    memory_strength: float = Field(0.0, ge=0.0, le=10.0)
    memory_pole_hz: float = Field(1e6, gt=0.0, le=1e10)
    memory_phase_deg: float = Field(90.0, ge=-360.0, le=360.0)

    @model_validator(mode="after")
    def _p1db_below_iip3(self) -> DutScenario:
        if self.p1db_dbm is not None and self.iip3_dbm - self.p1db_dbm < MIN_IIP3_ABOVE_P1DB_DB:
            raise ValueError(
                f"p1db_dbm must be at least {MIN_IIP3_ABOVE_P1DB_DB} dB below iip3_dbm "
                f"(a memoryless stage cannot compress later than its pure cubic); leave it out for the pure cubic"
            )
        return self


class PathScenario(_Strict):
    """Losses (positive dB) of the two source arms up to the DUT input, and of the DUT output to the analyzer."""

    ref_freq_hz: float = Field(2.45e9, gt=0.0, le=1e12)
    in1_loss_db: float = Field(6.5, ge=0.0, le=100.0)
    in1_slope_db_per_ghz: float = Field(0.8, ge=-10.0, le=10.0)
    in2_loss_db: float = Field(6.9, ge=0.0, le=100.0)
    in2_slope_db_per_ghz: float = Field(0.9, ge=-10.0, le=10.0)
    out_loss_db: float = Field(1.5, ge=0.0, le=100.0)
    out_slope_db_per_ghz: float = Field(0.4, ge=-10.0, le=10.0)


class SourcesScenario(_Strict):
    """The two signal sources and their combiner."""

    # Residual IM3 from limited combiner isolation, as an intercept referred to the DUT input plane.
    system_ip3_dbm: float = Field(45.0, ge=-20.0, le=300.0)
    settle_time_s: float = Field(0.005, ge=0.0, le=10.0)
    min_power_dbm: float = Field(-130.0, ge=-200.0, le=40.0)
    max_power_dbm: float = Field(20.0, ge=-200.0, le=40.0)

    @model_validator(mode="after")
    def _power_range(self) -> SourcesScenario:
        if self.min_power_dbm >= self.max_power_dbm:
            raise ValueError("min_power_dbm must be below max_power_dbm")
        return self


class AnalyzerScenario(_Strict):
    """The swept spectrum analyzer."""

    mixer_toi_dbm: float = Field(15.0, ge=-30.0, le=300.0)
    # Second-harmonic intercept of the first mixer (0 dB attenuation); None: its IM2 not modelled
    # (as before). Its two-tone IM2 is P1 + P2 - (SHI - 6 dB), in phase with the DUT's (sim/analyzer_im2.py).
    mixer_shi_dbm: float | None = Field(None, ge=-30.0, le=300.0)
    # Noise density at 0 dB attenuation; rises dB for dB with attenuation.
    danl_dbm_per_hz: float = Field(-150.0, ge=-200.0, le=-100.0)
    level_error_db: float = Field(0.0, ge=-20.0, le=20.0)
    # Amplitude error growing linearly from 0 Hz, on top of level_error_db.
    flatness_db_per_ghz: float = Field(0.0, ge=-10.0, le=10.0)
    # Trace/video averages with the VBW at the RBW or wider: the noise reading fluctuates as a
    # Gamma(k, 1/k) multiple of its mean; a narrower VBW gives RBW/VBW times more (physics.video_averages).
    noise_averages: int = Field(16, ge=1, le=100_000)
    overload_mixer_dbm: float = Field(-10.0, ge=-60.0, le=40.0)
    damage_dbm: float = Field(30.0, ge=-20.0, le=60.0)
    sweep_time_factor: float = Field(2.5, gt=0.0, le=100.0)
    trace_points: int = Field(1001, ge=3, le=100_001)
    # LO phase noise (sim/phase_noise.py: reciprocal mixing) at phase_noise_offset_hz, flat inside
    # it and -20 dB per decade beyond; None: an ideal LO (every existing figure unchanged).
    phase_noise_dbc_per_hz: float | None = Field(None, ge=-200.0, le=-40.0)
    phase_noise_offset_hz: float = Field(1e4, gt=0.0, le=1e9)


class PowerMeterScenario(_Strict):
    """A broadband power sensor on a coupled port at the DUT input plane: it reads the total power there."""

    # Fixed reading error of this meter and sensor (dB, added to every reading).
    accuracy_db: float = Field(0.03, ge=-3.0, le=3.0)
    # Standard deviation of the reading-to-reading scatter (dB), seeded.
    reading_noise_db: float = Field(0.01, ge=0.0, le=1.0)
    # Reading with no power applied (sensor noise and zero offset), dBm.
    noise_floor_dbm: float = Field(-70.0, ge=-150.0, le=0.0)
    # The sensor is corrected for the frequency it is told; a tone elsewhere reads off by this slope.
    sensor_slope_db_per_ghz: float = Field(0.5, ge=-10.0, le=10.0)
    measure_time_s: float = Field(0.02, ge=0.0, le=10.0)


class FetScenario(_Strict):
    """A FET stage in place of the memoryless DUT (`[simulation.fet]`): its drain current
    (sim/fet.py) at the gate bias the simulated gate supply holds sets the gain and the
    distortion. The bench then serves two simulated DC supplies, roles "gate" and "drain"
    (one output each, channel 1). Model defaults: the invented TBF-77 test FET (sim/fet.py)."""

    vt0_v: float = Field(0.45, ge=-5.0, le=5.0)
    dvt_dt_v_per_k: float = Field(-1.5e-3, ge=-0.02, le=0.02)
    n: float = Field(1.3, ge=1.0, le=3.0)
    is_a: float = Field(2e-3, gt=0.0, le=10.0)
    theta_per_v: float = Field(1.0, ge=0.0, le=20.0)
    ref_temp_k: float = Field(300.0, ge=150.0, le=500.0)
    mobility_exponent: float = Field(-1.5, ge=-3.0, le=0.0)
    # Device temperature when no chamber is on the bench.
    temp_k: float = Field(300.0, ge=150.0, le=500.0)
    # Gate voltage per volt at the DUT input plane (the input match's voltage gain): the gate-plane
    # prediction and the DUT-input measurement differ by 20 log10 of it.
    input_voltage_gain: float = Field(1.0, gt=0.0, le=20.0)
    # Drain load the signal current flows in, seen as the output voltage into the 50-ohm output path.
    load_ohm: float = Field(50.0, gt=0.0, le=10_000.0)
    # Below about this drain voltage the drain current falls (Id * tanh(Vd / knee_v)); 0 V: no current.
    knee_v: float = Field(0.3, gt=0.0, le=10.0)
    gate_leakage_ohm: float = Field(1e9, gt=0.0)
    # Standard deviation of each current reading of the simulated supplies (A), seeded.
    current_noise_a: float = Field(2e-7, ge=0.0, le=1e-2)


class ChamberScenario(_Strict):
    """A thermal chamber around the DUT (`[simulation.chamber]`, sim/chamber.py): the bench then
    serves it as role "chamber", and a FET's temperature is the chamber's device temperature."""

    ambient_c: float = Field(23.0, ge=-40.0, le=60.0)
    start_c: float = Field(23.0, ge=-100.0, le=250.0)
    air_time_constant_s: float = Field(120.0, gt=0.0, le=86400.0)
    device_time_constant_s: float = Field(60.0, gt=0.0, le=86400.0)
    # What the chamber can reach; a set point beyond settles at the limit (and never soaks).
    min_reach_c: float = Field(-70.0, ge=-100.0, le=250.0)
    max_reach_c: float = Field(180.0, ge=-100.0, le=250.0)

    @model_validator(mode="after")
    def _reach(self) -> ChamberScenario:
        if self.min_reach_c >= self.max_reach_c:
            raise ValueError("min_reach_c must be below max_reach_c")
        return self


class Scenario(_Strict):
    """The whole `[simulation]` table."""

    seed: int = Field(1, ge=0)
    # Phase of the system's coherent contributions (sources' residual IM3, analyzer mixer IM3)
    # relative to the DUT's own product at the same frequency: 0 adds in phase, 180 cancels.
    coherent_phase_deg: float = Field(0.0, ge=-360.0, le=360.0)
    dut: DutScenario = Field(default_factory=DutScenario)
    paths: PathScenario = Field(default_factory=PathScenario)
    sources: SourcesScenario = Field(default_factory=SourcesScenario)
    analyzer: AnalyzerScenario = Field(default_factory=AnalyzerScenario)
    power_meter: PowerMeterScenario = Field(default_factory=PowerMeterScenario)
    # A FET stage as the DUT, biased by simulated gate and drain supplies; None: the memoryless DUT above.
    fet: FetScenario | None = None
    # A thermal chamber; None: the device stays at fet.temp_k.
    chamber: ChamberScenario | None = None
    # A mixer in place of the DUT (sim/mixer.py), pumped by a third simulated source (role "lo").
    mixer: MixerScenario | None = None
    # A thru (0 dB, perfectly linear, noiseless) in place of the DUT; SimBench.set_thru switches it.
    thru: bool = False
    # Faults to inject ([[simulation.faults]] rows; see sim/faults.py), counted from the start.
    faults: list[FaultSpec] = Field(default_factory=list)
