"""The plan file: which device, which tones, which analyzer settings.

A plan says what to measure; the bench file says with what. Both are TOML.
"""

from __future__ import annotations

import hashlib
import tomllib
import unicodedata
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, Field, field_validator, model_validator

from tonebench.config.bias_settings import TONE_MAX_DBM, TONE_MIN_DBM, BiasSettings
from tonebench.config.detector_settings import DetectorSetup
from tonebench.config.loading import StrictModel, read_toml, validate
from tonebench.config.mixer_settings import MixerSettings
from tonebench.config.results_choice import ResultsSettings
from tonebench.errors import InputError

# Points one plan may expand to (README, DEVELOPERS.md). Counted from the axes' lengths before
# anything is expanded: a 10^8-point plan took gigabytes of memory with no message. 100 000
# points take about 17 MB expanded (measured) and, at a second a point on hardware, more than a day.
MAX_PLAN_POINTS = 100_000
MAX_FIXED_LEVELS = 50  # tone_levels_dbm: "a short list"; a longer one is a ramp


class PlanInfo(StrictModel):
    name: str = Field(min_length=1)
    description: str = ""


def control_character_problem(value: str, *, multiline: bool = False) -> str | None:
    """Why a device field cannot hold `value`, or None: control characters (Unicode category Cc,
    and the line and paragraph separators) would break the one-line listings and the exports
    that show these fields. Notes (multiline) may hold newlines and tabs."""
    allowed = "\n\t" if multiline else ""
    for index, char in enumerate(value):
        if char in allowed:
            continue
        if unicodedata.category(char) == "Cc" or char in "\u2028\u2029":
            return (f"control character U+{ord(char):04X} at position {index + 1}; only printable text is "
                    f"allowed{' (and newlines, tabs)' if multiline else ''}")
    return None


class DeviceInfo(StrictModel):
    part_number: str = Field(min_length=1)
    serial: str = Field(min_length=1)
    lot: str | None = None
    wafer: str | None = None
    position: str | None = None
    tags: list[str] = []
    notes: str = ""

    @field_validator("part_number", "serial", "lot", "wafer", "position", "notes")
    @classmethod
    def _printable(cls, value: str | None, info) -> str | None:
        problem = None if value is None else control_character_problem(value, multiline=info.field_name == "notes")
        if problem:
            raise ValueError(problem)
        return value

    @field_validator("tags")
    @classmethod
    def _printable_tags(cls, tags: list[str]) -> list[str]:
        for tag in tags:
            problem = control_character_problem(tag)
            if problem:
                raise ValueError(f"tag {tag!r}: {problem}")
        return tags


class SweepSettings(StrictModel):
    center_freqs_hz: list[float] = Field(min_length=1)
    spacings_hz: list[float] = Field(min_length=1)
    # Tone powers per tone at the DUT input: a ramp (start, stop, step) or fixed levels
    # (tone_levels_dbm: one drive level or a short list, for IMD at stated levels).
    tone_start_dbm: float | None = Field(default=None, ge=TONE_MIN_DBM, le=TONE_MAX_DBM)
    tone_stop_dbm: float | None = Field(default=None, ge=TONE_MIN_DBM, le=TONE_MAX_DBM)
    tone_step_dbm: float | None = Field(default=None, gt=0.0, le=20.0)
    tone_levels_dbm: list[float] | None = Field(default=None, min_length=1, max_length=MAX_FIXED_LEVELS)
    # Also read the second-order products f2-f1 and f1+f2 (IIP2), where the analyzer's range
    # and the output-path calibration reach them.
    second_order: bool = False
    # Chamber set points (degC), the outermost axis (a soak per change); needs a bench chamber.
    temperatures_c: list[float] | None = Field(default=None, min_length=1)

    @model_validator(mode="after")
    def _check(self) -> "SweepSettings":
        self._check_tone_form()
        if self.temperatures_c is not None:
            if any(not -100.0 <= t <= 250.0 for t in self.temperatures_c):
                raise ValueError("temperatures_c values must lie within -100..250 degC")
            if len(set(self.temperatures_c)) != len(self.temperatures_c):
                raise ValueError("temperatures_c repeats a temperature")
        for spacing_hz in self.spacings_hz:
            if spacing_hz <= 0:
                raise ValueError(f"spacings_hz must be > 0, got {spacing_hz}")
            for center_hz in self.center_freqs_hz:
                # The lower IM3 product sits 1.5 spacings below the centre: it must stay above 0 Hz.
                if center_hz - 1.5 * spacing_hz <= 0:
                    raise ValueError(
                        f"center {center_hz} Hz with spacing {spacing_hz} Hz puts 2f1-f2 at or below 0 Hz"
                    )
        return self

    def _check_tone_form(self) -> None:
        ramp = [name for name in ("tone_start_dbm", "tone_stop_dbm", "tone_step_dbm") if getattr(self, name) is not None]
        forms = "give tone_start_dbm, tone_stop_dbm and tone_step_dbm (a ramp) or tone_levels_dbm = [dBm, ...] (fixed levels)"
        if self.tone_levels_dbm is not None:
            if ramp:
                raise ValueError(f"tone_levels_dbm is given with {', '.join(ramp)}; {forms}, not both")
            for level in self.tone_levels_dbm:
                if not TONE_MIN_DBM <= level <= TONE_MAX_DBM:
                    raise ValueError(f"tone_levels_dbm value {level:g} dBm outside {TONE_MIN_DBM:g}..{TONE_MAX_DBM:g} dBm")
            if len({round(level, 6) for level in self.tone_levels_dbm}) != len(self.tone_levels_dbm):
                raise ValueError("tone_levels_dbm repeats a level")
            return
        if len(ramp) != 3:
            raise ValueError(f"[sweep] has {', '.join(ramp) or 'no tone powers'}; {forms}")
        if self.tone_stop_dbm < self.tone_start_dbm:
            raise ValueError("tone_stop_dbm must not be below tone_start_dbm")

    @property
    def tone_levels_dbm_given(self) -> bool:
        """Whether the plan states fixed tone levels (then per-level results are stored by default)."""
        return self.tone_levels_dbm is not None

    def tone_level_count(self) -> int:
        """How many levels tone_levels() gives, computed without building them."""
        if self.tone_levels_dbm is not None:
            return len(self.tone_levels_dbm)
        count = int(round((self.tone_stop_dbm - self.tone_start_dbm) / self.tone_step_dbm)) + 1
        # Rounding may take the last level past the stop by under half a step: it is left out.
        if round(self.tone_start_dbm + (count - 1) * self.tone_step_dbm, 6) > self.tone_stop_dbm + 1e-9:
            count -= 1
        return count

    def point_count(self) -> int:
        temperatures = len(self.temperatures_c) if self.temperatures_c else 1
        return temperatures * len(self.center_freqs_hz) * len(self.spacings_hz) * self.tone_level_count()

    def tone_levels(self) -> list[float]:
        """Every tone level, rising (the tone axis is iterated rising)."""
        if self.tone_levels_dbm is not None:
            return sorted(round(level, 6) for level in self.tone_levels_dbm)
        return [round(self.tone_start_dbm + i * self.tone_step_dbm, 6) for i in range(self.tone_level_count())]


class AnalyzerSettings(StrictModel):
    rbw_hz: float = Field(default=1000.0, gt=0.0, le=10e6)
    vbw_hz: float | None = Field(default=None, gt=0.0, le=50e6)
    span_hz: float | None = Field(default=None, gt=0.0, le=1e9)
    # Given: a fixed attenuation for every point. Left out: the sequencer chooses it per point at
    # the dynamic-range optimum (auto_atten), and 10 dB is the reference for the others.
    atten_db: float = Field(default=10.0, ge=0.0, le=70.0)
    # The reference level at atten_db; it moves dB for dB with the attenuation.
    ref_level_dbm: float = Field(default=0.0, ge=-120.0, le=30.0)
    # The attenuation-step check: the IM3 reads repeated with this much more attenuation at the
    # step_top_points highest tone powers of each sweep (and wherever the analyzer's own IM3 is
    # predicted within 20 dB of the reading).
    step_atten_db: float = Field(default=10.0, ge=4.0, le=30.0)
    step_top_points: int = Field(default=2, ge=0, le=50)
    # IM3 products under 10 dB over their noise are read again at a narrower RBW, their sweeps
    # held to this many seconds per point (run/narrowing.py). Left out: read at rbw_hz only.
    narrowing_budget_s: float | None = Field(default=None, gt=0.0, le=3600.0)
    # The two tones read at this RBW (span ten of it), far wider than the products need: a tone
    # is 60 dB or more over the noise, and its sweep time falls with the RBW squared. Left out:
    # the tones are read at rbw_hz like the products.
    tone_rbw_hz: float | None = Field(default=None, gt=0.0, le=10e6)
    # Settings chosen per read for an accuracy (run/read_settings.py): each IM3 product read at
    # the widest RBW predicted to put it product_snr_db over its noise, or the SNR that keeps the
    # noise's share of each point's IIP3 error within iip3_accuracy_db (one of the two). The
    # tones are then read at the widest RBW the spacing allows, unless tone_rbw_hz says. Never
    # narrower than rbw_hz, unless narrowing_budget_s pays for it. iip3_guess_dbm predicts each
    # sweep's first products and the bench time.
    product_snr_db: float | None = Field(default=None, ge=10.0, le=40.0)
    iip3_accuracy_db: float | None = Field(default=None, ge=0.01, le=1.0)
    iip3_guess_dbm: float | None = Field(default=None, ge=-60.0, le=70.0)
    # The analyzer's detector and trace averaging (config/detector_settings.py): sent at the run's
    # start and stored with each point, so the noise correction knows the bias of the mode read
    # with (analysis/detectors.py). All left out: the instrument's own, as before.
    detector: Literal["rms", "sample", "peak"] | None = None
    averaging: Literal["power", "log"] | None = None
    average_count: int | None = Field(default=None, ge=1, le=10_000)

    @model_validator(mode="after")
    def _one_target(self) -> "AnalyzerSettings":
        if self.product_snr_db is not None and self.iip3_accuracy_db is not None:
            raise ValueError("give product_snr_db or iip3_accuracy_db, not both (the SNR follows from the accuracy)")
        if self.reads_to_target and self.iip3_guess_dbm is None:
            raise ValueError("product_snr_db and iip3_accuracy_db need iip3_guess_dbm, a first guess of the "
                             "device's IIP3 (dBm) for each sweep's first point and the bench-time estimate")
        return self

    @property
    def detector_setup(self):
        """The DetectorSetup these keys ask for (rms and power averaging where one is left out),
        None when none is given."""
        if self.detector is None and self.averaging is None and self.average_count is None:
            return None
        return DetectorSetup(self.detector or "rms", self.averaging or "power", self.average_count or 1)

    @property
    def reads_to_target(self) -> bool:
        """The RBW is chosen per read for an accuracy (product_snr_db or iip3_accuracy_db)."""
        return self.product_snr_db is not None or self.iip3_accuracy_db is not None

    @property
    def auto_atten(self) -> bool:
        return "atten_db" not in self.model_fields_set

    @property
    def effective_vbw_hz(self) -> float:
        return self.vbw_hz if self.vbw_hz is not None else self.rbw_hz

    @property
    def effective_span_hz(self) -> float:
        # Ten RBWs: the Gaussian RBW skirt is > 100 dB down 3 RBW away, so the noise marker
        # (4 RBW from the line) reads noise, not the line.
        return self.span_hz if self.span_hz is not None else 10.0 * self.rbw_hz

    @property
    def noise_offset_hz(self) -> float:
        return 0.4 * self.effective_span_hz


class PlanFile(StrictModel):
    plan: PlanInfo
    device: DeviceInfo
    sweep: SweepSettings
    analyzer: AnalyzerSettings = AnalyzerSettings()
    bias: BiasSettings | None = None
    results: ResultsSettings | None = None
    mixer: MixerSettings | None = None  # a frequency-translating DUT (config/mixer_settings.py)

    @model_validator(mode="after")
    def _check_span(self) -> "PlanFile":
        narrowest_hz = min(self.sweep.spacings_hz)
        if self.analyzer.effective_span_hz >= narrowest_hz:
            raise ValueError(
                f"analyzer span {self.analyzer.effective_span_hz} Hz must be narrower than the tone "
                f"spacing {narrowest_hz} Hz, so each read sees one product only"
            )
        tone_rbw_hz = self.analyzer.tone_rbw_hz
        if tone_rbw_hz is not None and 10 * tone_rbw_hz >= narrowest_hz:
            raise ValueError(
                f"analyzer tone_rbw_hz {tone_rbw_hz:g} Hz: its span (ten of it) must be narrower than the tone "
                f"spacing {narrowest_hz:g} Hz, so each tone is read alone; give at most {narrowest_hz / 10:g} Hz less a step"
            )
        return self


class LoadedPlan(BaseModel):
    path: Path
    text: str
    sha256: str
    settings: PlanFile


def check_point_count(plan: PlanFile, origin: str) -> None:
    """Refuse (one line) a plan that would expand to more than MAX_PLAN_POINTS points."""
    sweep = plan.sweep
    biases = 1 if plan.bias is None else plan.bias.gate_count()
    lo_levels = 1 if plan.mixer is None or plan.mixer.lo_levels_dbm is None else len(plan.mixer.lo_levels_dbm)
    count = sweep.point_count() * biases * lo_levels
    if count <= MAX_PLAN_POINTS:
        return
    centers, spacings, levels = len(sweep.center_freqs_hz), len(sweep.spacings_hz), sweep.tone_level_count()
    gates = "" if plan.bias is None else f" x {biases:,} gate voltages"
    gates += "" if lo_levels == 1 else f" x {lo_levels} LO levels"
    raise InputError(
        f"{origin}: {count:,} points ({centers} center_freqs_hz x {spacings} spacings_hz x {levels:,} tone levels{gates}) "
        f"exceed the cap of {MAX_PLAN_POINTS:,} points per plan; split it into several plans (fewer "
        "center_freqs_hz or spacings_hz each) or raise tone_step_dbm"
    )


def load_plan(path: Path) -> LoadedPlan:
    text, data = read_toml(path, "plan")
    settings = validate(PlanFile, data, f"plan {path}")
    check_point_count(settings, f"plan {path}")
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return LoadedPlan(path=path, text=text, sha256=digest, settings=settings)


def plan_from_text(text: str, path: Path, origin: str) -> LoadedPlan:
    """A plan from its stored text (a run resumed from the database); `origin` names it in errors."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{origin}: not valid TOML ({exc})") from None
    settings = validate(PlanFile, data, origin)
    check_point_count(settings, origin)
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return LoadedPlan(path=path, text=text, sha256=digest, settings=settings)
