"""The system residual: the test system's own IM3 seen through a thru, as intercepts at the DUT input plane.

Pure numpy. With a thru in place the IM3 read at the DUT input plane (analyzer reading plus the
output loss) comes from two places: the sources (combiner isolation; it does not move with the
analyzer's attenuation) and the analyzer's first mixer (its input intercept rises dB for dB with
attenuation). Slope 3 is fixed, so each point gives an intercept and a sweep's intercept is their
mean (design section 3).

Splitting: an intercept IP3 stands for the product amplitude k = 10^(-IP3/10) (IM3 amplitude
relative to the tones' cube). The two shares are taken to add in phase, the worst case of the
phasor sum (design section 4): k(A) = k_src + k_an and k(A + step) = k_src + k_an * 10^(-step/10),
two equations for the two shares.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tonebench.analysis.sweep_fit import noise_corrected_dbm
from tonebench.analysis.intercepts import input_intercepts_dbm

MIN_SNR_DB = 10.0  # a residual reading is used only this far above its noise marker (design section 3)
# A share below 1 % of the whole amplitude (its intercept 20 dB above the system's) is within the
# scatter of the readings (0.05 dB in an intercept is about 1 % in amplitude): reported as a bound.
RESOLUTION = 0.01


@dataclass(frozen=True)
class InterceptEstimate:
    """One attenuation's sweep: the intercept (dBm at the DUT input plane) or, with nothing
    readable, a lower bound on it from the strongest point's noise floor."""

    ip3_dbm: float | None
    ip3_min_dbm: float | None
    n_valid: int


def system_intercept(p1_dbm, p2_dbm, im3_lower_dbm, im3_upper_dbm, noise_lower_dbm, noise_upper_dbm,
                     overload) -> InterceptEstimate:
    """Intercept from one thru sweep; all powers at the DUT input plane (dBm), arrays per point."""
    overload = np.asarray(overload, dtype=bool)
    values, bounds = [], []
    for im3, noise in ((im3_lower_dbm, noise_lower_dbm), (im3_upper_dbm, noise_upper_dbm)):
        im3, noise = np.asarray(im3, dtype=float), np.asarray(noise, dtype=float)
        corrected, _ = noise_corrected_dbm(im3, noise)
        valid = (im3 - noise >= MIN_SNR_DB) & ~overload
        values.append(np.where(valid, corrected, np.nan))
        # Not readable: the product is less than MIN_SNR_DB over the noise, so the intercept is above this.
        bounds.append(np.where(~overload, noise + MIN_SNR_DB, np.nan))
    lower, upper = input_intercepts_dbm(p1_dbm, p2_dbm, values[0], values[1])
    readable = np.concatenate([lower, upper])
    readable = readable[np.isfinite(readable)]
    if readable.size:
        return InterceptEstimate(float(np.mean(readable)), None, int(readable.size))
    lower_b, upper_b = input_intercepts_dbm(p1_dbm, p2_dbm, bounds[0], bounds[1])
    floor = np.concatenate([lower_b, upper_b])
    floor = floor[np.isfinite(floor)]
    # Each point bounds the intercept on its own; the strongest point gives the tightest bound.
    return InterceptEstimate(None, float(np.max(floor)) if floor.size else None, 0)


def _amplitude(ip3_dbm: float) -> float:
    return 10.0 ** (-ip3_dbm / 10.0)


def _intercept(amplitude: float) -> float | None:
    return -10.0 * math.log10(amplitude) if amplitude > 0.0 else None


@dataclass(frozen=True)
class ResidualSplit:
    """Intercepts (dBm, DUT input plane) of the whole system at the base attenuation, of the sources,
    and of the analyzer at the base attenuation. None: not resolved; *_min_dbm then bound it."""

    system_ip3_dbm: float | None
    source_ip3_dbm: float | None
    analyzer_ip3_dbm: float | None
    system_ip3_min_dbm: float | None = None
    source_ip3_min_dbm: float | None = None
    analyzer_ip3_min_dbm: float | None = None


def split_shares(base: InterceptEstimate, stepped: InterceptEstimate, step_db: float) -> ResidualSplit:
    """Split the residual into the sources' and the analyzer's share from two attenuations.

    step_db: the attenuation of `stepped` less that of `base` (positive, e.g. 10 dB).
    """
    ratio = 10.0 ** (-step_db / 10.0)  # the analyzer's amplitude share scales by this
    if base.ip3_dbm is None:
        # Nothing readable at all: every share is at least as far up as the whole.
        bound = base.ip3_min_dbm
        return ResidualSplit(None, None, None, bound, bound, bound)
    k_base = _amplitude(base.ip3_dbm)
    if stepped.ip3_dbm is None:
        # Gone into the noise with more attenuation: the analyzer's. The sources' share is at
        # most what the noise at the step allows (k_step <= k_bound, k_src = (k_step - r k_base)/(1 - r)).
        source_min = None
        if stepped.ip3_min_dbm is not None:
            k_src_max = (_amplitude(stepped.ip3_min_dbm) - ratio * k_base) / (1.0 - ratio)
            source_min = _intercept(k_src_max)
        return ResidualSplit(base.ip3_dbm, None, base.ip3_dbm, source_ip3_min_dbm=source_min)
    k_step = _amplitude(stepped.ip3_dbm)
    k_analyzer = (k_base - k_step) / (1.0 - ratio)
    k_source = k_base - k_analyzer
    floor = RESOLUTION * k_base
    # A share below what the readings resolve is given only as a bound on its intercept.
    source = _intercept(k_source) if k_source >= floor else None
    analyzer = _intercept(k_analyzer) if k_analyzer >= floor else None
    bound = _intercept(floor)
    return ResidualSplit(
        base.ip3_dbm, source, analyzer,
        source_ip3_min_dbm=None if source is not None else bound,
        analyzer_ip3_min_dbm=None if analyzer is not None else bound,
    )


@dataclass(frozen=True)
class CheckShares:
    """What the source-intermod check charges a DUT measurement with, from a stored residual.

    source_ip3_dbm: the sources' share (its intercept, dBm at the DUT input plane), or a bound on it
    (source_is_bound: the share is at most this large, its intercept at least this high);
    analyzer_ip3_dbm: the analyzer's share at atten_db, which rises dB for dB with attenuation
    (analysis.attenuation.residual_ip3_at_atten_dbm carries it to each point's attenuation).
    """

    source_ip3_dbm: float | None
    source_is_bound: bool
    analyzer_ip3_dbm: float | None
    atten_db: float


def check_shares(system_ip3_dbm: float | None, source_ip3_dbm: float | None, analyzer_ip3_dbm: float | None,
                 atten_db: float, source_ip3_min_dbm: float | None = None,
                 analyzer_ip3_min_dbm: float | None = None, split_known: bool = True) -> CheckShares | None:
    """The shares to charge, or None when the residual was not readable at all.

    A share the thru run could not resolve is charged at its bound, never as the whole residual:
    when the analyzer's own IM3 dominated the thru, the whole is the analyzer's at atten_db and
    falls with more attenuation. A set without the split (split_known False) charges the whole to
    the sources, which can only overstate them.
    """
    if system_ip3_dbm is None:
        return None
    if not split_known:
        return CheckShares(system_ip3_dbm, False, None, atten_db)
    analyzer = analyzer_ip3_dbm if analyzer_ip3_dbm is not None else analyzer_ip3_min_dbm
    if source_ip3_dbm is not None:
        return CheckShares(source_ip3_dbm, False, analyzer, atten_db)
    return CheckShares(source_ip3_min_dbm, source_ip3_min_dbm is not None, analyzer, atten_db)
