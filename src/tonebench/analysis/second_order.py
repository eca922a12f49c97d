"""Second-order intercept (IIP2) from the f2-f1 ("diff") and f1+f2 ("sum") products.

For y = a1 x + a2 x^2 and tones A1, A2 the products at f2-f1 and f1+f2 both have amplitude
a2 A1 A2, so the input-referred product is P1 + P2 - IIP2 (dBm) and a valid region shows slope 2.
Per point IIP2 = P1 + P2 - (Pim2 - G); with the slope fixed at 2 the least-squares fit is the mean
of the per-point intercepts over the valid points, as for IIP3.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tonebench.analysis.sweep_fit import (
    IM3_OVER_NOISE_MIN_DB,
    MIN_VALID_POINTS,
    noise_corrected_dbm,
)
from tonebench.analysis.region import small_signal_usable
from tonebench.analysis.uncertainty import scatter_half_width_db

PRODUCTS = ("diff", "sum")


@dataclass(frozen=True)
class SecondOrderResult:
    """IIP2/OIP2 (dBm), the free IM2 slope, and a bound (dB), overall and per product.

    iip2_dbm is the mean (in dB) of the products that could be fitted; per_product maps "diff" and
    "sum" to their own dict (iip2_dbm, slope, n_valid, bound_db, reason).
    """

    iip2_dbm: float | None
    oip2_dbm: float | None
    slope_im2: float | None
    bound_db: float | None
    per_product: dict[str, dict]
    reason: str | None


def point_iip2_dbm(pin1_dbm, pin2_dbm, gain_db, im2_dbm) -> np.ndarray:
    """Per-point IIP2 (dBm): P1 + P2 - (Pim2 - G), Pim2 DUT-referred at the output."""
    return (np.asarray(pin1_dbm, dtype=float) + np.asarray(pin2_dbm, dtype=float)
            - (np.asarray(im2_dbm, dtype=float) - np.asarray(gain_db, dtype=float)))


def fit_second_order(pin1_dbm, pin2_dbm, gain_db, usable, products: dict[str, tuple],
                     level_accuracy_db: float, compression_db,
                     small_signal_gain_db: float | None,
                     analyzer_made: dict[str, np.ndarray] | None = None) -> SecondOrderResult:
    """Fit IIP2 with slope 2 for each product given as name -> (im2_dbm, noise_dbm) arrays.

    usable: points inside the small-signal region of the tones (gain, overload), a bool array;
    gain_db the per-point gain, compression_db how far it is below small_signal_gain_db.
    A product's point is valid when also at least 10 dB over its own noise floor. The bound of
    each product's IIP2 is the analyzer's relative level accuracy (IIP2 takes it 1:1), the gain
    compression of its points (1:1 through G) and the fit scatter. analyzer_made: per product the
    points the analyzer's own IM2 may share (second_order_checks.py), left out.
    """
    pin1 = np.asarray(pin1_dbm, dtype=float)
    pin2 = np.asarray(pin2_dbm, dtype=float)
    gain = np.asarray(gain_db, dtype=float)
    usable = np.asarray(usable, dtype=bool)
    per_product: dict[str, dict] = {}
    for name, (im2_dbm, noise_dbm) in products.items():
        im2 = np.asarray(im2_dbm, dtype=float)
        noise = np.asarray(noise_dbm, dtype=float)
        if not np.isfinite(im2).any():
            continue
        corrected, _ = noise_corrected_dbm(im2, noise)
        with np.errstate(invalid="ignore"):
            clear = im2 - noise >= IM3_OVER_NOISE_MIN_DB
        valid = usable & clear & np.isfinite(corrected)
        made = (analyzer_made or {}).get(name)
        if made is not None:
            valid &= ~np.asarray(made, dtype=bool)
        n_valid = int(valid.sum())
        entry = {"n_valid": n_valid, "iip2_dbm": None, "slope": None, "bound_db": None, "reason": None}
        if n_valid < MIN_VALID_POINTS:
            entry["reason"] = (f"{name} product: only {n_valid} points at least {IM3_OVER_NOISE_MIN_DB:g} dB "
                               f"over the noise in the small-signal region" + _analyzer_part(made)
                               + f" (need {MIN_VALID_POINTS})")
        else:
            per_point = point_iip2_dbm(pin1, pin2, gain, corrected)[valid]
            x = ((pin1 + pin2) / 2.0)[valid]
            entry["iip2_dbm"] = float(per_point.mean())
            entry["slope"] = float(np.polyfit(x, corrected[valid], 1)[0]) if np.ptp(x) > 0 else None
            entry["bound_db"] = float(level_accuracy_db + float(np.mean(np.asarray(compression_db)[valid]))
                                      + scatter_half_width_db(per_point))
        per_product[name] = entry
    fitted = [e for e in per_product.values() if e["iip2_dbm"] is not None]
    if not fitted:
        reasons = [e["reason"] for e in per_product.values() if e["reason"]]
        return SecondOrderResult(None, None, None, None, per_product,
                                 "; ".join(reasons) if reasons else "no second-order readings")
    iip2 = float(np.mean([e["iip2_dbm"] for e in fitted]))
    slopes = [e["slope"] for e in fitted if e["slope"] is not None]
    return SecondOrderResult(
        iip2_dbm=iip2,
        oip2_dbm=None if small_signal_gain_db is None else iip2 + small_signal_gain_db,
        slope_im2=float(np.mean(slopes)) if slopes else None,
        bound_db=float(max(e["bound_db"] for e in fitted)),
        per_product=per_product,
        reason=None,
    )


def _analyzer_part(made) -> str:
    count = 0 if made is None else int(np.sum(made))
    return f" and clear of the analyzer's own IM2 ({count} left out)" if count else ""


def sweep_second_order(a: dict[str, np.ndarray], point_gain_db, over, small_signal_gain_db: float | None,
                       level_accuracy_db: float, compression_db,
                       analyzer_made: dict[str, np.ndarray] | None = None) -> SecondOrderResult | None:
    """IIP2 of one sweep (SweepData.arrays()) over the tones' small-signal, non-overloaded points;
    None when no second-order product was read."""
    if not (np.isfinite(a["im2_diff_dbm"]).any() or np.isfinite(a["im2_sum_dbm"]).any()):
        return None
    usable = small_signal_usable(point_gain_db, small_signal_gain_db, np.isfinite(point_gain_db) & ~over)
    return fit_second_order(
        a["pin1_dbm"], a["pin2_dbm"], point_gain_db, usable,
        {"diff": (a["im2_diff_dbm"], a["noise_diff_dbm"]), "sum": (a["im2_sum_dbm"], a["noise_sum_dbm"])},
        level_accuracy_db, compression_db, small_signal_gain_db, analyzer_made)
