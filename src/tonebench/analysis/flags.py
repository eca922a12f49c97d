"""Flags: why a reading or a result may be the test system's rather than the device's (design sec. 4).

The names are the store's vocabulary (store/models.py FLAGS and ANALYZER_CAUSES). error_db is
always the error the cause may put into the third-order intercept (IIP3), in dB, or None where it
cannot be bounded (an overloaded or noise-buried reading).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tonebench.analysis.sweep_fit import NOISE_CORRECT_MIN_DB, noise_corrected_dbm

ANALYZER_LIMITED = "analyzer-limited"
SOURCE_INTERMOD_LIMITED = "source-intermod-limited"
COMPRESSED = "compressed"
TONE_IMBALANCE = "tone-imbalance"
SLOPE = "slope"
NOISE, DISTORTION, OVERLOAD = "noise", "distortion", "overload"

STEP_CHANGE_LIMIT_DB = 1.0  # a real product keeps its DUT-referred level within this across the step
STEP_READ_MIN_SNR_DB = 10.0  # both step readings must clear their noise by this to be compared
STEP_COVERAGE = 2.0  # an analyzer-made verdict needs the change beyond the limit by this many sigma
SYSTEM_MARGIN_DB = 20.0  # a system-made product closer than this under the reading flags it
TONE_IMBALANCE_LIMIT_DB = 0.5  # at the DUT input plane
SLOPE_TOLERANCE = 0.3  # free IM3 slope must lie within 3 +/- this


@dataclass(frozen=True)
class Flag:
    """One flag: name (FLAGS), cause (ANALYZER_CAUSES, analyzer-limited only), why, IIP3 error (dB)."""

    flag: str
    cause: str | None
    detail: str
    error_db: float | None

    @property
    def label(self) -> str:
        return self.flag if self.cause is None else f"{self.flag} ({self.cause})"


def reading_scatter_db(snr) -> np.ndarray:
    """Expected 1-sigma scatter (dB) of one product reading snr dB over its noise floor.

    The noise adds to the product as a random phasor n; in one look the power S + 2 Re(s n*) + |n|^2
    scatters by sqrt(2 S N), i.e. 10 log10(e) sqrt(2) 10^(-snr/20) dB (the small-noise expansion of
    a sine in Gaussian noise, from memory). Taken for a single look: the analysis does not know
    how much the analyzer averaged, and averaging only shrinks it.
    """
    snr = np.asarray(snr, dtype=float)
    return 10.0 * np.log10(np.e) * math.sqrt(2.0) * 10.0 ** (-snr / 20.0)


def step_limit_db(snr_db, step_snr_db) -> np.ndarray:
    """How far a product must move across the step to be the analyzer's: STEP_CHANGE_LIMIT_DB widened
    by STEP_COVERAGE times the scatter the two readings' noise gives their difference. A reading
    buried in its noise (compared as an upper bound) counts with the scatter at STEP_READ_MIN_SNR_DB."""
    s1 = reading_scatter_db(np.fmax(snr_db, STEP_READ_MIN_SNR_DB))
    s2 = reading_scatter_db(np.fmax(step_snr_db, STEP_READ_MIN_SNR_DB))
    return STEP_CHANGE_LIMIT_DB + STEP_COVERAGE * np.hypot(s1, s2)


@dataclass(frozen=True)
class StepJudgement:
    """The attenuation-step check of one product, per point (arrays).

    change_db: DUT-referred level with the extra attenuation minus without (noise-corrected);
    limit_db: the change an analyzer-made verdict needs (step_limit_db, widened for noise);
    conclusive: the comparison is decisive: within 1 dB (the device's), or beyond limit_db
    (analyzer_made); a change between the two says nothing either way;
    analyzer_dbm: the analyzer's own product at its input at the point's own attenuation, as the
    change reveals it (at least that large), NaN where not conclusive.
    """

    change_db: np.ndarray
    limit_db: np.ndarray
    conclusive: np.ndarray
    analyzer_made: np.ndarray
    analyzer_dbm: np.ndarray


def judge_step(reading_dbm, noise_dbm, step_reading_dbm, step_noise_dbm, step_atten_db) -> StepJudgement:
    """Compare a product read at attenuation A and again at A + step (raw, analyzer input, dBm).

    Output loss is the same for both reads, so raw readings compare as DUT-referred ones would.
    The device's product keeps its level; the analyzer's own falls 2 dB per dB of attenuation
    (design sec. 4). Both readings are noise-corrected; the first must clear its floor by
    STEP_READ_MIN_SNR_DB; so must the second, except that a fall into the noise of more than
    STEP_CHANGE_LIMIT_DB still proves the point (a noisy reading only overstates the product).
    The noise scatters each reading, so a move beyond 1 dB is the analyzer's only when it also
    clears the scatter (step_limit_db); a smaller one leaves the point to the prediction.
    With collinear phasors the analyzer's share M at A follows from the two voltages:
    |v1 - v2| = |M| (1 - 10^(-step/10)); for other phases this underestimates M.
    """
    step_db = np.asarray(step_atten_db, dtype=float)
    r1 = np.asarray(reading_dbm, dtype=float)
    r2 = np.asarray(step_reading_dbm, dtype=float)
    c1, _ = noise_corrected_dbm(r1, noise_dbm)
    c2, _ = noise_corrected_dbm(r2, step_noise_dbm)
    with np.errstate(invalid="ignore"):
        snr1 = r1 - np.asarray(noise_dbm, dtype=float)
        snr2 = r2 - np.asarray(step_noise_dbm, dtype=float)
        clear1 = snr1 >= STEP_READ_MIN_SNR_DB
        clear2 = snr2 >= STEP_READ_MIN_SNR_DB
        # Buried: compare the raw step reading, which can only overstate the product.
        change = np.where(clear2, c2 - c1, r2 - c1)
        limit = step_limit_db(snr1, snr2)
        decisive = (np.abs(change) <= STEP_CHANGE_LIMIT_DB) | (np.abs(change) > limit)
        dropped = ~clear2 & (change < -limit)
        conclusive = np.isfinite(change) & (step_db > 0) & clear1 & (clear2 | dropped) & decisive
        made = conclusive & (np.abs(change) > limit)
        v1 = 10.0 ** (c1 / 20.0)
        v2 = 10.0 ** (np.where(clear2, c2, r2) / 20.0)
        share = np.abs(v1 - v2) / (1.0 - 10.0 ** (-step_db / 10.0))
        analyzer_dbm = np.where(conclusive & (share > 0), 20.0 * np.log10(np.where(share > 0, share, 1.0)), np.nan)
    return StepJudgement(change, limit, conclusive, made, analyzer_dbm)


def snr_db(reading_dbm, noise_dbm) -> np.ndarray:
    """Reading over its noise floor (dB)."""
    return np.asarray(reading_dbm, dtype=float) - np.asarray(noise_dbm, dtype=float)


def noise_error_db(snr) -> np.ndarray:
    """IIP3 error (dB) the noise may leave in a reading snr dB over its floor.

    The correction removes the noise's mean; what is left is its fluctuation, taken here as up to
    the size of the correction itself (a conservative reading of design sec. 3), halved for IIP3.
    Below NOISE_CORRECT_MIN_DB the reading is only an upper bound: inf.
    """
    snr = np.asarray(snr, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        size = -10.0 * np.log10(1.0 - 10.0 ** (-snr / 10.0))
    return np.where(snr > NOISE_CORRECT_MIN_DB, size / 2.0, np.inf)


def snr_for_noise_error_db(error_db: float) -> float:
    """The signal-to-noise (dB) at which noise_error_db is error_db: its inverse."""
    return -10.0 * math.log10(1.0 - 10.0 ** (-2.0 * error_db / 10.0))
