"""The bench file: instruments, their dialects, path losses, safety limits, and (for a simulated
bench) the simulation scenario."""

from __future__ import annotations

import difflib
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from tonebench.config.loading import StrictModel, read_toml, validate
from tonebench.config.results_choice import ResultsSettings
from tonebench.errors import InputError
from tonebench.config.instrument_keys import ANALYZER_PERFORMANCE_KEYS
from tonebench.config.resource_names import check_resource_name
from tonebench.sim.scenario import Scenario

REQUIRED_ROLES = ("source1", "source2", "analyzer")
# A power meter at the DUT input plane: measured input calibration and closed-loop leveling.
# Gate and drain: one output each of a DC supply or SMU, for a FET's bias (both or neither).
BIAS_ROLES = ("gate", "drain")
# A thermal chamber around the DUT: temperature as a plan axis (needs the [chamber] table).
# An LO source for a frequency-translating DUT (a mixer): driven like a tone source, with its own
# power limit ([limits] max_lo_dbm) and RF off on every way out like the tones.
LO_ROLE = "lo"
OPTIONAL_ROLES = ("power_meter", *BIAS_ROLES, "chamber", LO_ROLE)


class BenchInfo(StrictModel):
    name: str = Field(min_length=1)
    description: str = ""
    # Calibration set (by name, in the database) a run uses unless `--cal` names another;
    # without either, the [offsets] table below.
    calibration: str | None = Field(default=None, min_length=1)
    # pyvisa's library specification: "@py" (pyvisa-py), "@ivi" (an installed vendor VISA), a
    # path to a VISA shared library, or "path@ivi". Left out: pyvisa's own conventions
    # (PYVISA_LIBRARY, then .pyvisarc, then an installed VISA, then pyvisa-py).
    visa_library: str | None = Field(default=None, min_length=1)


# Analyzer figures a bench file may set over its dialect's [performance] table: this unit's own
# mixer TOI and noise floor, and its relative level accuracy (tone versus IM3 reading) for the bound.
# The keys are the analyzer dialect's [performance] keys (one list, in instruments/dialect.py); a
# key added there without a range here fails at import.
_PERFORMANCE_RANGES = {
    "mixer_toi_dbm": (-50.0, 100.0),
    "danl_dbm_per_hz": (-200.0, -100.0),
    "sweep_time_factor": (0.01, 100.0),
    "level_accuracy_db": (0.0, 5.0),
    "mixer_shi_dbm": (-50.0, 150.0),
    "phase_noise_dbc_per_hz": (-200.0, -40.0),
    "phase_noise_offset_hz": (1.0, 1e9),
}
PERFORMANCE_OVERRIDES = {key: _PERFORMANCE_RANGES[key] for key in ANALYZER_PERFORMANCE_KEYS}


class InstrumentEntry(StrictModel):
    dialect: str = Field(min_length=1)
    # A VISA resource string; left out on a simulated bench, where the simulator assigns one.
    resource: str | None = None
    performance: dict[str, float] = {}
    # The output of a multi-output supply this role uses (gate and drain only).
    channel: int = Field(default=1, ge=1, le=16)

    @field_validator("performance")
    @classmethod
    def _known_figures(cls, figures: dict[str, float]) -> dict[str, float]:
        for key, value in figures.items():
            if key not in PERFORMANCE_OVERRIDES:
                close = difflib.get_close_matches(key.lower(), PERFORMANCE_OVERRIDES, n=1)
                hint = f" (did you mean {close[0]}?)" if close else ""
                raise ValueError(f"performance.{key} is not a figure tonebench uses; allowed: "
                                 f"{', '.join(PERFORMANCE_OVERRIDES)}{hint}")
            low, high = PERFORMANCE_OVERRIDES[key]
            if not low <= value <= high:
                raise ValueError(f"performance.{key} = {value:g} outside {low:g}..{high:g}")
        return figures


class OffsetTables(StrictModel):
    """Path losses in positive dB as [freq_hz, loss_db] pairs, in increasing frequency."""

    in1: list[tuple[float, float]] = Field(min_length=1)
    in2: list[tuple[float, float]] = Field(min_length=1)
    out: list[tuple[float, float]] = Field(min_length=1)

    @field_validator("in1", "in2", "out")
    @classmethod
    def _increasing(cls, rows: list[tuple[float, float]]) -> list[tuple[float, float]]:
        freqs_hz = [freq_hz for freq_hz, _ in rows]
        if any(freq_hz <= 0 for freq_hz in freqs_hz):
            raise ValueError("frequencies must be > 0 Hz")
        if any(b <= a for a, b in zip(freqs_hz, freqs_hz[1:])):
            raise ValueError("frequencies must increase strictly from row to row")
        if any(not -1.0 <= loss_db <= 80.0 for _, loss_db in rows):
            raise ValueError("losses must lie between -1 and 80 dB (positive dB means loss)")
        return rows


class BenchLimits(StrictModel):
    """Checked before RF goes on, for every point of a plan."""

    max_tone_dbm: float = Field(ge=-150.0, le=30.0, description="per tone at the DUT input plane")
    max_analyzer_input_dbm: float = Field(ge=-100.0, le=40.0, description="total at the analyzer input")
    expected_gain_db: float = Field(ge=-60.0, le=60.0, description="DUT gain used to predict output power")
    # The LO source's power at its connector; required when the bench has an lo role.
    max_lo_dbm: float | None = Field(default=None, ge=-150.0, le=30.0, description="LO source power at most")


class LevelingSettings(StrictModel):
    """Closed-loop leveling with the power meter; it runs whenever the bench has one and enabled is true."""

    enabled: bool = True
    tolerance_db: float = Field(default=0.05, gt=0.0, le=1.0, description="each tone within this of its target")
    max_iterations: int = Field(default=5, ge=1, le=20, description="meter readings per tone at most")
    max_correction_db: float = Field(default=3.0, gt=0.0, le=10.0, description="largest correction on top of the calibration")


class UnattendedSettings(StrictModel):
    """What a run does about instrument faults when nobody watches it."""

    # After a point failed all its attempts (it is stored as failed, with the reason): go on with
    # the next point, pause the run (RF off; `tonebench resume` measures it again), or abort.
    on_point_failure: Literal["continue", "pause", "abort"] = "continue"
    point_attempts: int = Field(default=4, ge=1, le=20, description="measurements of one point at most")
    retries: int = Field(default=2, ge=0, le=20, description="same-connection retries after a timeout")
    reconnects: int = Field(default=3, ge=0, le=20, description="close-and-reopen attempts after those")
    backoff_s: float = Field(default=0.2, ge=0.0, le=60.0, description="first wait, doubled each attempt")
    watchdog_s: float = Field(default=120.0, ge=0.5, le=86400.0, description="RF off after this long without progress")
    rf_off_s: float = Field(default=30.0, ge=0.5, le=600.0,
                            description="RF off is retried this long on the way out before a source is reported on")
    # Two reads of each tone, at the start and the end of a point, must agree within this (dB),
    # else the point is measured again (a source still settling); 0 skips the repeat reads.
    settle_tolerance_db: float = Field(default=0.1, ge=0.0, le=10.0)
    # Across the points of a sweep, the f1-f2 tone difference must stay within this (dB) of the
    # sweep's first point, else a source is drifting (src/tonebench/run/drift.py); 0 switches it off.
    drift_tolerance_db: float = Field(default=0.1, ge=0.0, le=10.0)


class BiasLimits(StrictModel):
    """`[bias]`: limits on the gate and drain supplies, checked before anything is switched on,
    and how the bias comes up and goes down.

    Sequence (one rule for enhancement and depletion parts): the gate comes on first at
    gate_idle_v (pinch-off for a depletion part), then the drain ramps up, then the gate ramps to
    its point; going down the gate ramps back to gate_idle_v, the drain ramps to 0 V and goes off,
    and the gate goes off last. Every change moves at most ramp_step_v at a time, at ramp_v_per_s."""

    gate_min_v: float = Field(ge=-20.0, le=20.0)
    gate_max_v: float = Field(ge=-20.0, le=20.0)
    gate_idle_v: float = Field(default=0.0, ge=-20.0, le=20.0)
    gate_current_limit_a: float = Field(default=1e-3, gt=0.0, le=1.0)
    drain_v: float = Field(ge=0.0, le=60.0, description="held unless the plan gives one")
    drain_max_v: float = Field(ge=0.0, le=60.0)
    drain_current_limit_a: float = Field(gt=0.0, le=10.0)
    ramp_v_per_s: float = Field(default=5.0, gt=0.0, le=1000.0)
    ramp_step_v: float = Field(default=0.1, gt=0.0, le=5.0)
    settle_s: float = Field(default=0.01, ge=0.0, le=60.0, description="after each bias change, before reading")

    @model_validator(mode="after")
    def _ordered(self) -> "BiasLimits":
        if self.gate_min_v > self.gate_max_v:
            raise ValueError(f"gate_min_v {self.gate_min_v:g} V is above gate_max_v {self.gate_max_v:g} V")
        if not self.gate_min_v <= self.gate_idle_v <= self.gate_max_v:
            raise ValueError(f"gate_idle_v {self.gate_idle_v:g} V outside gate_min_v..gate_max_v "
                             f"({self.gate_min_v:g}..{self.gate_max_v:g} V)")
        if self.drain_v > self.drain_max_v:
            raise ValueError(f"drain_v {self.drain_v:g} V is above drain_max_v {self.drain_max_v:g} V")
        return self


class ChamberLimits(StrictModel):
    """`[chamber]`: the temperatures a plan may ask for, and what a soak is. A soak is done when
    the chamber reads within tolerance_c of the set point for dwell_s without a break; one that
    is not done after timeout_s is a fault. The chamber stays at the last set point when a command
    ends (a study at several temperatures is several runs); bringing it back is the lab's call."""

    min_c: float = Field(ge=-100.0, le=250.0)
    max_c: float = Field(ge=-100.0, le=250.0)
    tolerance_c: float = Field(default=0.5, gt=0.0, le=20.0)
    dwell_s: float = Field(default=300.0, ge=0.0, le=86400.0)
    timeout_s: float = Field(default=3600.0, gt=0.0, le=7 * 86400.0)
    poll_s: float = Field(default=10.0, gt=0.0, le=600.0)
    # How fast the chamber gets to a new set point, for the bench-time estimate only (the soak
    # itself waits for the reading); left out, the estimate counts the dwells alone.
    ramp_c_per_min: float | None = Field(default=None, gt=0.0, le=100.0)

    @model_validator(mode="after")
    def _ordered(self) -> "ChamberLimits":
        if self.min_c > self.max_c:
            raise ValueError(f"min_c {self.min_c:g} degC is above max_c {self.max_c:g} degC")
        if self.timeout_s < self.dwell_s:
            raise ValueError(f"timeout_s {self.timeout_s:g} s is shorter than dwell_s {self.dwell_s:g} s")
        return self


class BenchFile(StrictModel):
    bench: BenchInfo
    instruments: dict[str, InstrumentEntry]
    offsets: OffsetTables | None = None
    limits: BenchLimits
    leveling: LevelingSettings = LevelingSettings()
    unattended: UnattendedSettings = UnattendedSettings()
    bias: BiasLimits | None = None
    chamber: ChamberLimits | None = None
    results: ResultsSettings | None = None  # the bench's reporting choice; a plan's [results] wins
    simulation: dict[str, Any] | None = None

    @field_validator("instruments")
    @classmethod
    def _roles(cls, instruments: dict[str, InstrumentEntry]) -> dict[str, InstrumentEntry]:
        missing = [role for role in REQUIRED_ROLES if role not in instruments]
        if missing:
            raise ValueError(f"missing instrument role(s) {', '.join(missing)}; needed: {', '.join(REQUIRED_ROLES)}")
        allowed = REQUIRED_ROLES + OPTIONAL_ROLES
        unknown = [role for role in instruments if role not in allowed]
        if unknown:
            raise ValueError(f"unknown instrument role(s) {', '.join(unknown)}; allowed: {', '.join(allowed)}")
        for role, entry in instruments.items():
            if entry.performance and role != "analyzer":
                raise ValueError(f"instruments.{role}.performance: only the analyzer takes performance figures")
            if "channel" in entry.model_fields_set and role not in BIAS_ROLES:
                raise ValueError(f"instruments.{role}.channel: only the {' and '.join(BIAS_ROLES)} roles take a channel")
        bias_roles = [role for role in BIAS_ROLES if role in instruments]
        if len(bias_roles) == 1:
            raise ValueError(f"instruments: {bias_roles[0]} without {(set(BIAS_ROLES) - set(bias_roles)).pop()}; "
                             "a FET's bias needs both the gate and the drain role")
        return instruments

    @model_validator(mode="after")
    def _bias_limits(self) -> "BenchFile":
        if self.has_bias and self.bias is None:
            raise ValueError("[bias] is missing: a bench with gate and drain supplies needs its limits "
                             "(gate_min_v, gate_max_v, drain_v, drain_max_v, drain_current_limit_a)")
        if self.bias is not None and not self.has_bias:
            raise ValueError("[bias] is given but instruments has no gate and drain roles")
        if self.has_lo and self.limits.max_lo_dbm is None:
            raise ValueError("[limits] max_lo_dbm is missing: a bench with an lo source needs its LO power limit (dBm)")
        if self.has_chamber and self.chamber is None:
            raise ValueError("[chamber] is missing: a bench with a chamber needs its limits (min_c, max_c)")
        if self.chamber is not None and not self.has_chamber:
            raise ValueError("[chamber] is given but instruments has no chamber role")
        if self.chamber is not None and self.chamber.poll_s >= self.unattended.watchdog_s:
            raise ValueError(f"[chamber] poll_s {self.chamber.poll_s:g} s is not below [unattended] watchdog_s "
                             f"{self.unattended.watchdog_s:g} s: a soak would trip the watchdog between readings")
        return self

    @property
    def has_lo(self) -> bool:
        return LO_ROLE in self.instruments

    @property
    def has_chamber(self) -> bool:
        return "chamber" in self.instruments

    @property
    def has_bias(self) -> bool:
        return all(role in self.instruments for role in BIAS_ROLES)

    @property
    def has_power_meter(self) -> bool:
        return "power_meter" in self.instruments

    @property
    def simulated(self) -> bool:
        return self.simulation is not None


class LoadedBench(BaseModel):
    model_config = ConfigDict(arbitrary_types_allowed=True)

    path: Path
    settings: BenchFile
    scenario: Scenario | None = None  # on a simulated bench


def load_bench(path: Path) -> LoadedBench:
    _, data = read_toml(path, "bench file")
    settings = validate(BenchFile, data, f"bench file {path}")
    scenario = None
    if settings.simulated:
        scenario = validate(Scenario, settings.simulation, f"bench file {path} [simulation]")
        check_simulated_roles(settings, scenario, path)
    else:
        for role, entry in settings.instruments.items():
            if not entry.resource:
                raise InputError(
                    f"bench file {path}: field 'instruments.{role}.resource' is missing "
                    "(needed on a hardware bench; e.g. TCPIP0::192.0.2.10::5025::SOCKET)"
                )
    check_resources(settings, path)
    return LoadedBench(path=path, settings=settings, scenario=scenario)


def check_simulated_roles(settings: BenchFile, scenario: Scenario, path: Path) -> None:
    """The simulator serves gate and drain only with a simulated FET, and a chamber only with a
    simulated chamber; a role it cannot serve is refused here, naming the table it needs."""
    needs = {"gate": ("fet", scenario.fet), "drain": ("fet", scenario.fet), "chamber": ("chamber", scenario.chamber),
             LO_ROLE: ("mixer", scenario.mixer)}
    for role, (table, present) in needs.items():
        if role in settings.instruments and present is None:
            raise InputError(f"bench file {path}: instruments.{role} on a simulated bench needs a "
                             f"[simulation.{table}] table (the simulated part it is connected to)")


def check_resources(settings: BenchFile, path: Path) -> None:
    """Every role's resource string, when the file is read: a bad one is refused before any
    connection is tried, naming the role and the allowed forms."""
    for role, entry in settings.instruments.items():
        if entry.resource:
            check_resource_name(entry.resource, f"bench file {path}: instruments.{role}")
