"""Settings chosen per read for a stated accuracy ([analyzer] product_snr_db or iip3_accuracy_db).

Bench time is mostly analyzer sweeps, and a sweep at span ten RBWs takes k * 10 / RBW: a product
read ten times wider costs a tenth. So each IM3 product is read at the widest RBW that still puts
it the target over its noise, predicted before the read:
- the product: slope 3 from the weaker product of its sweep's last accepted point (noise removed),
  or, for a sweep's first point, from the plan's iip3_guess_dbm: IM3 = tone - 2 (IIP3 - Pin);
- the noise at a candidate RBW: the analyzer's DANL + 10 log RBW + the attenuation the optimum
  gives at that RBW (run/attenuation_choice.py), or the noise density the sweep's last point
  measured where it lies NOISE_ABOVE_MODEL_DB over that (the device's own output noise);
- the candidates: the 1-2-5 steps from the widest whose span (ten RBWs) stays inside the tone
  spacing, down to the plan's rbw_hz, or with narrowing_budget_s to the narrowest the budget pays
  two sweeps of; the widest that clears target + TARGET_MARGIN_DB is taken, else the narrowest;
- the noise read: the mean power of NOISE_MARKERS beside each product, not one marker.
A read that still falls short of the target is read again narrower within the budget
(run/narrowing.py), so a wrong prediction costs one cheap wide sweep. The tones are read at the
widest step inside the spacing (a tone sits 60 dB or more over the noise), unless tone_rbw_hz says.
VBW and span keep their ratio to the RBW, as the plan gives them (VBW = RBW when left out). No
narrower VBW or trace averaging is chosen per read: the target SNR already allows the noise a
one-sample fluctuation (analysis/flags.noise_error_db), the six-marker noise reading's scatter
is absorbed by the margin and the narrowing re-read, and a VBW under the RBW costs RBW/VBW in
sweep time for a scatter that falls only as sqrt(VBW/RBW) (measured in DEVELOPERS.md).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace

from tonebench.analysis.attenuation import analyzer_noise_dbm
from tonebench.analysis.flags import snr_for_noise_error_db
from tonebench.analysis.sweep_fit import IM3_OVER_NOISE_MIN_DB
from tonebench.config.plan_file import AnalyzerSettings
from tonebench.instruments.analyzer import AnalyzerSetup
from tonebench.plan.points import PlannedPoint
from tonebench.run.attenuation_choice import AttenuationChoice
from tonebench.run.narrowing import MIN_RBW_HZ, TARGET_MARGIN_DB, narrowed, step_down_hz

SPAN_RBWS = 10.0  # the span is ten RBWs (AnalyzerSettings.effective_span_hz)
# A noise marker is one sample and scatters about 1 dB around the model (16 averages); only a
# measured floor this far over the model (the device's own noise, an interferer) replaces it.
NOISE_ABOVE_MODEL_DB = 3.0
# The noise markers of a read to a target, as multiples of the plan's noise offset (4 RBW): 3, 4
# and 5 RBW to either side of the product. Its SNR decides whether the read is taken again, and
# one marker (one sample) scatters about 1 dB; the mean power of six, a whole RBW apart (so
# independent samples) and bracketing the product, about 0.45 dB. 3 RBW is over 100 dB down the
# Gaussian RBW skirt; the tones lie more than 5 RBW further (the span is inside the spacing).
NOISE_MARKERS = (0.75, 1.0, 1.25, -0.75, -1.0, -1.25)


def target_snr_db(settings: AnalyzerSettings) -> float | None:
    """The products' signal-to-noise each read must reach (dB); None with fixed settings. Never
    under IM3_OVER_NOISE_MIN_DB, below which a product does not count in the fit."""
    if settings.iip3_accuracy_db is not None:
        return max(snr_for_noise_error_db(settings.iip3_accuracy_db), IM3_OVER_NOISE_MIN_DB)
    return settings.product_snr_db


def widest_rbw_hz(spacing_hz: float) -> float:
    """The widest 1-2-5 RBW whose span (ten of it) is narrower than the tone spacing."""
    return step_down_hz(spacing_hz / SPAN_RBWS * (1 - 1e-6))


def guessed_product_dbm(tone_at_analyzer_dbm: float, tone_dbm: float, iip3_guess_dbm: float) -> float:
    """An IM3 product at the analyzer input from a guessed IIP3: each product lies 2 (IIP3 - Pin)
    under the tone at the output (the slope-1 and slope-3 lines meet at the intercept)."""
    return tone_at_analyzer_dbm - 2.0 * (iip3_guess_dbm - tone_dbm)


@dataclass(frozen=True)
class ProductChoice:
    rbw_hz: float
    predicted_snr_db: float  # the weaker product's over its predicted noise at that RBW
    target_db: float


def choose_product_rbw(product_dbm: float, target_db: float, widest_hz: float, narrowest_hz: float,
                       setup_at: Callable[[float], AnalyzerSetup], danl_dbm_per_hz: float,
                       measured_noise_dbm_per_hz: float | None = None) -> ProductChoice:
    """The widest 1-2-5 step from widest_hz down to narrowest_hz whose predicted SNR reaches
    target_db + TARGET_MARGIN_DB, else narrowest_hz (see the module docstring)."""
    rbw_hz = step_down_hz(widest_hz)
    narrowest_hz = min(narrowest_hz, rbw_hz)
    while True:
        setup = setup_at(rbw_hz)
        noise_dbm = float(analyzer_noise_dbm(danl_dbm_per_hz, rbw_hz, setup.atten_db))
        if measured_noise_dbm_per_hz is not None:
            measured_dbm = measured_noise_dbm_per_hz + 10.0 * math.log10(rbw_hz)
            if measured_dbm > noise_dbm + NOISE_ABOVE_MODEL_DB:
                noise_dbm = measured_dbm
        snr_db = product_dbm - noise_dbm
        narrower_hz = step_down_hz(rbw_hz * (1 - 1e-6))
        if snr_db >= target_db + TARGET_MARGIN_DB or narrower_hz < narrowest_hz * (1 - 1e-9):
            return ProductChoice(rbw_hz, snr_db, target_db)
        rbw_hz = narrower_hz


def narrowest_rbw_hz(settings: AnalyzerSettings, plan_setup: AnalyzerSetup,
                     sweep_time_s: Callable[[AnalyzerSetup], float]) -> float:
    """The narrowest RBW a read may take: the plan's rbw_hz, or with a narrowing budget the
    narrowest 1-2-5 step whose two product sweeps it pays."""
    if settings.narrowing_budget_s is None:
        return settings.rbw_hz
    rbw_hz = step_down_hz(settings.rbw_hz)
    while rbw_hz > MIN_RBW_HZ * (1 + 1e-9):
        narrower_hz = step_down_hz(rbw_hz * (1 - 1e-6))
        if 2 * sweep_time_s(narrowed(plan_setup, narrower_hz)) > settings.narrowing_budget_s:
            break
        rbw_hz = narrower_hz
    return rbw_hz


def tone_setup_for(settings: AnalyzerSettings, setup: AnalyzerSetup, spacing_hz: float) -> AnalyzerSetup:
    """Where the tones of a point read at `setup` are read: at the plan's tone_rbw_hz, else (with
    an accuracy target) the widest step inside the spacing, else at `setup` itself. Span ten of
    the RBW, VBW in proportion; attenuation and reference level as the products'."""
    tone_rbw_hz = settings.tone_rbw_hz
    if tone_rbw_hz is None and settings.reads_to_target:
        tone_rbw_hz = widest_rbw_hz(spacing_hz)
    if tone_rbw_hz is None:
        return setup
    return replace(setup, rbw_hz=tone_rbw_hz, vbw_hz=tone_rbw_hz * setup.vbw_hz / setup.rbw_hz,
                   span_hz=SPAN_RBWS * tone_rbw_hz)


class TargetReads:
    """The products' setup of each point for the plan's accuracy target."""

    def __init__(self, attenuation: AttenuationChoice, sweep_time_s: Callable[[AnalyzerSetup], float]):
        settings = attenuation.settings
        self.attenuation = attenuation
        self.target_db = target_snr_db(settings)
        self.iip3_guess_dbm = settings.iip3_guess_dbm
        self.narrowest_hz = narrowest_rbw_hz(settings, attenuation.setup, sweep_time_s)

    def setup_for(self, point: PlannedPoint, predicted_tone_dbm: Callable[[], float],
                  predicted_product: tuple[float, float] | None) -> tuple[AnalyzerSetup, str, ProductChoice]:
        """The products' setup, how its attenuation was chosen, and the RBW choice behind it.
        predicted_product: (weaker product dBm, noise density dBm/Hz) from the sweep's last
        point; None for its first (the plan's iip3_guess_dbm then predicts it)."""
        if predicted_product is None:
            product_dbm, noise_dbm_per_hz = guessed_product_dbm(predicted_tone_dbm(), point.tone_dbm,
                                                                self.iip3_guess_dbm), None
        else:
            product_dbm, noise_dbm_per_hz = predicted_product
        danl_dbm_per_hz = self.attenuation.analyzer.performance["danl_dbm_per_hz"]
        choice = choose_product_rbw(product_dbm, self.target_db, widest_rbw_hz(point.spacing_hz), self.narrowest_hz,
                                    lambda rbw_hz: self.attenuation.setup_for(predicted_tone_dbm, rbw_hz)[0],
                                    danl_dbm_per_hz, noise_dbm_per_hz)
        setup, how = self.attenuation.setup_for(predicted_tone_dbm, choice.rbw_hz)
        return setup, how, choice
