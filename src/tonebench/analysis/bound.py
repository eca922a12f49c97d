"""How far a sweep's intercept can be trusted, as named steps: the terms of the IIP3 bound over the
fitted points, their combination, and, when noise refused the intercept, the IIP3 the readings
still prove (design section 4). Plain arrays and values in, plain values out.
"""

from __future__ import annotations

import math

import numpy as np

from tonebench.analysis.sweep_fit import SweepResult, mean_of
from tonebench.analysis.intercepts import point_intercepts
from tonebench.analysis.point_checks import mean_pair
from tonebench.analysis.region import small_signal_usable
from tonebench.analysis.uncertainty import combine, scatter_half_width_db


def compression_shift_db(point_iip3_dbm, compression_db, valid) -> float:
    """How much the onset of compression may bias the fixed-slope intercept (dB).

    The valid region admits points compressed by up to 0.3 dB; near compression a device's IM3
    departs from slope 3 by an amount its gain alone does not tell (a pure cubic reads low by
    c/2, a stage that saturates early by several times c). So the term is the larger of the
    mean compression c of the fitted points and the fit's shift when the more compressed half of
    them is left out (the sensitivity of the result to its region).
    """
    idx = np.flatnonzero(valid)
    if idx.size == 0:
        return 0.0
    comp = np.asarray(compression_db, dtype=float)
    mean_c = float(mean_of(comp[idx]))
    if idx.size < 4:
        return mean_c
    ordered = idx[np.argsort(comp[idx], kind="stable")]
    keep = ordered[: (idx.size + 1) // 2]
    values = np.asarray(point_iip3_dbm, dtype=float)
    shift = abs(float(mean_of(values[idx]) - mean_of(values[keep])))
    return max(shift, mean_c)


def noise_term_db(noise_err, valid) -> float:
    """The noise's share of the bound: the per-point noise errors added in quadrature, over n points."""
    return float(math.sqrt(float(np.sum(noise_err[valid] ** 2))) / int(valid.sum()))


def bound_terms_db(fit: SweepResult, level_accuracy_db: float, source_err, analyzer_err, compression_db,
                   noise_err) -> dict[str, float]:
    """The IIP3 bound's terms (dB) over the fitted points; empty without an intercept.

    level: half the analyzer's relative level accuracy (IIP3 takes a level error by half);
    source, analyzer: the mean per-point error of each system product; compression:
    compression_shift_db; scatter: the fit's scatter; noise: noise_term_db.
    """
    if fit.iip3_dbm is None:
        return {}
    valid = fit.valid_mask
    return {
        "level": level_accuracy_db / 2.0,
        "source": float(mean_of(source_err[valid])),
        "analyzer": float(mean_of(analyzer_err[valid])),
        "compression": compression_shift_db(fit.point_iip3_dbm, compression_db, valid),
        "scatter": scatter_half_width_db(fit.point_iip3_dbm[valid]),
        "noise": noise_term_db(noise_err, valid),
    }


def iip3_bound_db(terms_db: dict[str, float]) -> float | None:
    """The combined half-width (dB), None without terms or when a term is unbounded."""
    if not terms_db:
        return None
    half_width = combine(terms_db).half_width_db
    return half_width if math.isfinite(half_width) else None


def iip3_at_least_dbm(a: dict[str, np.ndarray], excluded, point_gain_db, small_signal_gain_db: float | None,
                      level_accuracy_db: float) -> float | None:
    """The IIP3 the raw readings prove when noise refused the intercept (dBm), None if no point can.

    excluded: points that say nothing of the device (overloaded, analyzer-made). A reading with
    noise in it only overstates the product, so its intercept understates: the highest per-point
    intercept of the small-signal points, less half the level accuracy, is a lower bound.
    """
    raw_pts = point_intercepts(a["pin1_dbm"], a["pin2_dbm"], a["pout_f1_dbm"], a["pout_f2_dbm"],
                               a["im3_lower_dbm"], a["im3_upper_dbm"])
    lb = mean_pair(raw_pts.iip3_lower_dbm, raw_pts.iip3_upper_dbm)
    usable = small_signal_usable(point_gain_db, small_signal_gain_db, np.isfinite(lb) & ~excluded)
    if usable.any():
        return float(lb[usable].max() - level_accuracy_db / 2.0)
    return None
