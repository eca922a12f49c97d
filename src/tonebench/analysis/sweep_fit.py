"""Fit one two-tone sweep: valid small-signal region, fixed- and free-slope fits (design.md sec 3).

A sweep is one (center, spacing, bias) group; every input is a 1-D array with one value per
point, DUT-referred, in dBm. Nothing here loops over points.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tonebench.analysis.compression import p1db
from tonebench.analysis.intercepts import PointIntercepts, point_intercepts
from tonebench.errors import InputError

MIN_VALID_POINTS = 3
IM3_OVER_NOISE_MIN_DB = 10.0  # IM3 must clear its noise floor by this much to count
GAIN_TOLERANCE_DB = 0.3  # a point is small-signal while its gain stays this close
SMALL_SIGNAL_POINTS = 3  # lowest-power points whose median gain is the small-signal gain
NOISE_CORRECT_MIN_DB = 3.0  # at or below this the reading is only an upper bound
NOISE_CORRECT_MAX_DB = 20.0  # at or above this the noise adds < 0.05 dB: leave the reading


@dataclass(frozen=True)
class SweepResult:
    """Fitted results of one sweep. Powers in dBm, gain in dB, slopes in dB/dB.

    Intercepts and slopes are None when fewer than 3 points are valid; `reason` then says why.
    p1db_in_dbm is the per-tone input power (both tones on) at 1 dB gain compression, i.e. the
    two-tone P1dB, not the single-tone one.
    """

    n_points: int
    n_valid: int
    valid_mask: np.ndarray
    gain_db: float | None
    iip3_lower_dbm: float | None
    iip3_upper_dbm: float | None
    iip3_dbm: float | None
    oip3_lower_dbm: float | None
    oip3_upper_dbm: float | None
    oip3_dbm: float | None
    slope_fundamental: float | None
    slope_im3_lower: float | None
    slope_im3_upper: float | None
    p1db_in_dbm: float | None
    p1db_out_dbm: float | None
    valid_tone_min_dbm: float | None
    valid_tone_max_dbm: float | None
    reason: str | None
    # Free-slope fits: where the free fundamental line meets the free IM3 line (mean of lower
    # and upper), None without two distinct input powers or when the lines do not converge.
    iip3_free_dbm: float | None = None
    # Per point: gain (dB) and the mean of the lower and upper intercepts (dBm), every point.
    point_gain_db: np.ndarray | None = None
    point_iip3_dbm: np.ndarray | None = None


def mean_of(values: np.ndarray):
    """np.mean of a 1-D float array, bit for bit (the same sum over the count), without its
    Python-level overhead: the assessment takes a few dozen means per sweep."""
    if values.size == 0 or values.dtype != np.float64:
        return np.mean(values)
    return np.add.reduce(values) / values.size


def median_of(values: np.ndarray) -> float:
    """np.median of a short 1-D float array, bit for bit: the middle value, or the mean of the two
    middle ones as (a + b) / 2 (NaN when any value is NaN), without np.median's overhead."""
    ordered = np.sort(values)
    if ordered.size == 0 or np.isnan(ordered[-1]):
        return float(np.median(values))
    mid = ordered.size // 2
    return float(ordered[mid] if ordered.size % 2 else (ordered[mid - 1] + ordered[mid]) / 2.0)


def noise_corrected_dbm(reading_dbm, noise_dbm) -> tuple[np.ndarray, np.ndarray]:
    """Remove the noise power N (dBm, same analyzer settings) from a reading R (dBm).

    Returns (corrected_dbm, upper_bound_mask). Where 3 dB < R - N < 20 dB the result is
    10*log10(10^(R/10) - 10^(N/10)); at R - N >= 20 dB the reading is kept as is; at
    R - N <= 3 dB the reading is kept but is only an upper bound (mask True). A NaN on either
    side leaves the reading unchanged and unflagged.
    """
    reading = np.asarray(reading_dbm, dtype=float)
    excess_db = reading - np.asarray(noise_dbm, dtype=float)
    correct = (excess_db > NOISE_CORRECT_MIN_DB) & (excess_db < NOISE_CORRECT_MAX_DB)
    # R + 10log10(1 - 10^(-(R-N)/10)) is the same subtraction without forming large powers;
    # taken only where it applies, so no warning needs silencing (that costs more than the sum).
    shift_db = np.zeros_like(excess_db)
    np.log10(1.0 - 10.0 ** (-excess_db / 10.0), out=shift_db, where=correct)
    corrected = np.where(correct, reading + 10.0 * shift_db, reading)
    return corrected, excess_db <= NOISE_CORRECT_MIN_DB


def small_signal_gain_db(tone_dbm, gain_db, usable) -> float | None:
    """Median gain of the lowest-power usable points (up to SMALL_SIGNAL_POINTS of them).

    Three points keep the estimate in the small-signal region while the median shrugs off
    one bad reading; a shorter sweep uses what it has. None when no point is usable.
    """
    idx = np.flatnonzero(usable)
    if idx.size == 0:
        return None
    lowest = idx[np.argsort(np.asarray(tone_dbm, dtype=float)[idx], kind="stable")]
    return median_of(np.asarray(gain_db, dtype=float)[lowest[:SMALL_SIGNAL_POINTS]])


FIT_INPUTS = ("tone_dbm", "pin1_dbm", "pin2_dbm", "pout_f1_dbm", "pout_f2_dbm", "im3_lower_dbm",
               "im3_upper_dbm", "noise_lower_dbm", "noise_upper_dbm")


def _checked_arrays(values: tuple, overload) -> dict[str, np.ndarray]:
    """The inputs as float arrays by name (overload as bool), each 1-D with one value per point."""
    arrays = {name: np.asarray(v, dtype=float) for name, v in zip(FIT_INPUTS, values)}
    arrays["overload"] = np.asarray(overload, dtype=bool)
    n_points = arrays["tone_dbm"].size
    for name, arr in arrays.items():
        if arr.ndim != 1 or arr.size != n_points:
            raise InputError(f"fit_sweep: {name} has shape {arr.shape}; every array must be 1-D "
                             f"with one value per point ({n_points}, like tone_dbm)")
    return arrays


def _excluded_mask(exclude: dict[str, np.ndarray] | None, n_points: int) -> np.ndarray:
    """The union of the caller's further exclusions (bool, per point)."""
    excluded = np.zeros(n_points, bool)
    for label, mask in (exclude or {}).items():
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != (n_points,):
            raise InputError(f"fit_sweep: exclude[{label!r}] has shape {mask.shape}; needs ({n_points},)")
        excluded |= mask
    return excluded


def _refusal_reason(n_valid: int, n_points: int, causes: dict[str, np.ndarray], no_small_signal: bool) -> str:
    """Why too few points are valid: the count, then each cause with its own count."""
    parts = [f"{int(m.sum())} {label}" for label, m in causes.items() if m.any()]
    reason = (f"only {n_valid} of {n_points} points {'meets' if n_valid == 1 else 'meet'} "
              f"the valid-region rules (need {MIN_VALID_POINTS})")
    if parts:
        reason += ": " + ", ".join(parts)
    if no_small_signal and n_points:
        reason += "; no point free of overload and missing readings sets the small-signal gain"
    return reason


def _line(x, y, valid, spread: bool) -> tuple[float, float] | None:
    """Least-squares line (slope, offset) of y over the valid points; None without a spread in x.
    The closed form of a straight-line fit: np.polyfit's general solver costs eight times more."""
    if not spread:
        return None
    x, y = np.asarray(x, dtype=float), y[valid]
    x_mean, y_mean = mean_of(x), mean_of(y)
    dx = x - x_mean
    slope = float(dx @ (y - y_mean) / (dx @ dx))
    return slope, float(y_mean - slope * x_mean)


def _slope(x, y, valid, spread: bool) -> float | None:
    fitted = _line(x, y, valid, spread)
    return None if fitted is None else fitted[0]


def free_iip3_dbm(x, valid, pout_mean, im3_lower, im3_upper, spread: bool) -> float | None:
    """Where the free-slope fundamental line meets the free IM3 lines (mean of both; dBm).

    The fundamental s1 x + c1 meets each IM3 line s3 x + c3 at x = (c1 - c3)/(s3 - s1); None
    unless both IM3 lines are steeper than the fundamental.
    """
    return _free_iip3_dbm(*(_line(x, y, valid, spread) for y in (pout_mean, im3_lower, im3_upper)))


def _free_iip3_dbm(fundamental, lower, upper) -> float | None:
    """free_iip3_dbm from the three fitted lines ((slope, offset) or None)."""
    free = []
    for third in (lower, upper):
        if fundamental is not None and third is not None and third[0] - fundamental[0] > 0:
            free.append((fundamental[1] - third[1]) / (third[0] - fundamental[0]))
    return float(np.mean(free)) if len(free) == 2 else None


@dataclass(frozen=True)
class _Region:
    """The valid region and what each rule left out (bool per point), with the small-signal gain."""

    valid: np.ndarray
    finite: np.ndarray
    noisy: np.ndarray
    compressed: np.ndarray
    expanded: np.ndarray
    gain_db: float | None


def _finite_and_noisy(a: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Per point: every reading the fit takes is there; IM3 within IM3_OVER_NOISE_MIN_DB of its floor."""
    finite = np.all([np.isfinite(a[n]) for n in FIT_INPUTS[:7]], axis=0)
    noisy = ~((a["im3_lower_dbm"] - a["noise_lower_dbm"] >= IM3_OVER_NOISE_MIN_DB)
              & (a["im3_upper_dbm"] - a["noise_upper_dbm"] >= IM3_OVER_NOISE_MIN_DB))
    return finite, noisy


def _valid_region(a: dict[str, np.ndarray], point_gain_db, excluded, finite_noisy=None) -> _Region:
    """The small-signal gain, then the points with every reading, IM3 clear of the noise, gain within
    GAIN_TOLERANCE_DB of it, no overload and not excluded. Each cause is counted on its own
    (finite_noisy: _finite_and_noisy of these points when worked out already)."""
    n_points = a["tone_dbm"].size
    over = a["overload"]
    finite, noisy = _finite_and_noisy(a) if finite_noisy is None else finite_noisy
    gss = small_signal_gain_db(a["tone_dbm"], point_gain_db, finite & ~over)
    if gss is None:
        compressed = expanded = gain_ok = np.zeros(n_points, bool)
    else:
        compressed = point_gain_db < gss - GAIN_TOLERANCE_DB
        expanded = point_gain_db > gss + GAIN_TOLERANCE_DB
        gain_ok = np.abs(point_gain_db - gss) <= GAIN_TOLERANCE_DB
    valid = finite & ~noisy & gain_ok & ~over & ~excluded
    return _Region(valid, finite, noisy, compressed, expanded, gss)


LATER_CHECK = "by a later check (see its flags)"


def exclusion_reasons(arrays: dict[str, np.ndarray], valid_mask) -> list[str | None]:
    """Per point, why it is outside the valid region (None for a point in it), by the rules of
    _valid_region in their order; a point those rules keep but the fit still left out was
    excluded by a later step (the analyzer's own IM3, higher-order terms: see its flags).

    arrays: the fit's inputs by name (tone_dbm ... noise_upper_dbm, overload), as fit_sweep takes them."""
    a = _checked_arrays(tuple(arrays[name] for name in FIT_INPUTS), arrays["overload"])
    im3_lower, _ = noise_corrected_dbm(a["im3_lower_dbm"], a["noise_lower_dbm"])
    im3_upper, _ = noise_corrected_dbm(a["im3_upper_dbm"], a["noise_upper_dbm"])
    pts = point_intercepts(a["pin1_dbm"], a["pin2_dbm"], a["pout_f1_dbm"], a["pout_f2_dbm"], im3_lower, im3_upper)
    region = _valid_region(a, pts.gain_db, np.zeros(a["tone_dbm"].size, bool))
    rules = (
        (~region.finite, "a reading is missing"),
        (a["overload"], "the analyzer was overloaded"),
        (region.noisy & region.finite, f"IM3 within {IM3_OVER_NOISE_MIN_DB:g} dB of the noise floor"),
        (region.compressed, f"compressed: gain more than {GAIN_TOLERANCE_DB:g} dB below the small-signal gain"),
        (region.expanded, f"expanded: gain more than {GAIN_TOLERANCE_DB:g} dB above the small-signal gain"),
    )
    reasons: list[str | None] = []
    for i, valid in enumerate(np.asarray(valid_mask, dtype=bool)):
        if valid:
            reasons.append(None)
            continue
        reasons.append(next((why for mask, why in rules if mask[i]), LATER_CHECK))
    return reasons


def fit_sweep(
    tone_dbm, pin1_dbm, pin2_dbm, pout_f1_dbm, pout_f2_dbm, im3_lower_dbm, im3_upper_dbm,
    noise_lower_dbm, noise_upper_dbm, overload, exclude: dict[str, np.ndarray] | None = None,
) -> SweepResult:
    """Fit one sweep (1-D arrays, one value per point; overload is a bool array).

    Fixed-slope fit: with the fundamental y1 = x + b1 (slope 1) and the IM3 product
    y3 = 3x + b3 (slope 3, x the input power of the product's 2P1+P2 or P1+2P2 over 3), least
    squares over the valid points minimises sum (y_i - s x_i - b)^2, whose derivative in b
    vanishes at b = mean(y_i - s x_i). The lines meet at IIP3 = (b1 - b3)/2, and as both b are
    means of per-point terms, IIP3 = mean((2P1+P2 - Pim3_i + G_i)/2) = the mean of the per-point
    intercepts; OIP3 = IIP3 + b1 = the mean of the per-point OIP3. Lower and upper are fitted
    separately; the reported mean intercept is (lower + upper)/2 in dB.

    exclude maps a reason (e.g. "analyzer-made") to a bool array of further points to leave out of
    the valid region; they are counted under that reason when the fit is refused.
    """
    a = _checked_arrays((tone_dbm, pin1_dbm, pin2_dbm, pout_f1_dbm, pout_f2_dbm, im3_lower_dbm,
                         im3_upper_dbm, noise_lower_dbm, noise_upper_dbm), overload)
    return fit_with_points(a, fit_points(a), exclude)


@dataclass(frozen=True)
class FitPoints:
    """What fit_sweep works out point by point before it reduces: the noise-corrected IM3 (dBm),
    the per-point intercepts, and the mean input and output tone (dBm). Point by point, so it
    may be worked out for many sweeps at once and sliced."""

    im3_lower_dbm: np.ndarray
    im3_upper_dbm: np.ndarray
    pts: PointIntercepts
    pin_mean_dbm: np.ndarray
    pout_mean_dbm: np.ndarray
    finite: np.ndarray  # every reading the fit takes is there
    noisy: np.ndarray  # IM3 within IM3_OVER_NOISE_MIN_DB of its floor (the valid-region rule)

    def part(self, points: slice) -> FitPoints:
        """These values for a slice of the points."""
        pts = PointIntercepts(**{name: value[points] for name, value in vars(self.pts).items()})
        return FitPoints(self.im3_lower_dbm[points], self.im3_upper_dbm[points], pts, self.pin_mean_dbm[points],
                         self.pout_mean_dbm[points], self.finite[points], self.noisy[points])


def fit_points(a: dict[str, np.ndarray], im3_lower_dbm=None, im3_upper_dbm=None) -> FitPoints:
    """FitPoints of the arrays (im3_*_dbm: the noise-corrected IM3 when worked out already)."""
    if im3_lower_dbm is not None and im3_upper_dbm is not None:
        pts = point_intercepts(a["pin1_dbm"], a["pin2_dbm"], a["pout_f1_dbm"], a["pout_f2_dbm"],
                               im3_lower_dbm, im3_upper_dbm)
        return FitPoints(im3_lower_dbm, im3_upper_dbm, pts, (a["pin1_dbm"] + a["pin2_dbm"]) / 2.0,
                         (a["pout_f1_dbm"] + a["pout_f2_dbm"]) / 2.0, *_finite_and_noisy(a))
    im3_lower, _ = noise_corrected_dbm(a["im3_lower_dbm"], a["noise_lower_dbm"])
    im3_upper, _ = noise_corrected_dbm(a["im3_upper_dbm"], a["noise_upper_dbm"])
    pts = point_intercepts(a["pin1_dbm"], a["pin2_dbm"], a["pout_f1_dbm"], a["pout_f2_dbm"],
                           im3_lower, im3_upper)
    return fit_points(a, im3_lower, im3_upper)


def fit_with_points(a: dict[str, np.ndarray], points: FitPoints,
                    exclude: dict[str, np.ndarray] | None = None) -> SweepResult:
    """fit_sweep's reductions over checked arrays (FIT_INPUTS and overload) and their FitPoints."""
    n_points = a["tone_dbm"].size
    over = a["overload"]
    im3_lower, im3_upper, pts = points.im3_lower_dbm, points.im3_upper_dbm, points.pts
    pin_mean, pout_mean = points.pin_mean_dbm, points.pout_mean_dbm
    region = _valid_region(a, pts.gain_db, _excluded_mask(exclude, n_points), (points.finite, points.noisy))
    valid, gss = region.valid, region.gain_db
    n_valid = int(valid.sum())

    p1db_in = p1db_out = None
    if gss is not None:
        p1db_in, p1db_out = p1db(np.where(over, np.nan, pin_mean), pts.gain_db, gss)
    valid_tone = a["tone_dbm"][valid]
    common = dict(n_points=n_points, n_valid=n_valid, valid_mask=valid, gain_db=gss,
                  point_gain_db=pts.gain_db, point_iip3_dbm=(pts.iip3_lower_dbm + pts.iip3_upper_dbm) / 2.0,
                  p1db_in_dbm=p1db_in, p1db_out_dbm=p1db_out,
                  valid_tone_min_dbm=float(valid_tone.min()) if n_valid else None,
                  valid_tone_max_dbm=float(valid_tone.max()) if n_valid else None)

    if n_valid < MIN_VALID_POINTS:
        causes = {
            "with missing readings": ~region.finite,
            f"IM3 within {IM3_OVER_NOISE_MIN_DB:g} dB of the noise floor": region.noisy & region.finite,
            "compressed": region.compressed,
            "expanded": region.expanded,
            "overloaded": over,
            **{label: np.asarray(mask, dtype=bool) for label, mask in (exclude or {}).items()},
        }
        return SweepResult(iip3_lower_dbm=None, iip3_upper_dbm=None, iip3_dbm=None,
                           oip3_lower_dbm=None, oip3_upper_dbm=None, oip3_dbm=None,
                           slope_fundamental=None, slope_im3_lower=None, slope_im3_upper=None,
                           reason=_refusal_reason(n_valid, n_points, causes, gss is None), **common)

    iip3_lower = float(mean_of(pts.iip3_lower_dbm[valid]))
    iip3_upper = float(mean_of(pts.iip3_upper_dbm[valid]))
    oip3_lower = float(mean_of(pts.oip3_lower_dbm[valid]))
    oip3_upper = float(mean_of(pts.oip3_upper_dbm[valid]))
    x = pin_mean[valid]
    spread = bool(np.ptp(x) > 0)  # a slope needs at least two distinct input powers
    # The three free lines, each fitted once (free_iip3_dbm fits the same three).
    fundamental, lower, upper = (_line(x, y, valid, spread) for y in (pout_mean, im3_lower, im3_upper))
    return SweepResult(
        iip3_lower_dbm=iip3_lower,
        iip3_upper_dbm=iip3_upper,
        iip3_dbm=(iip3_lower + iip3_upper) / 2.0,
        oip3_lower_dbm=oip3_lower,
        oip3_upper_dbm=oip3_upper,
        oip3_dbm=(oip3_lower + oip3_upper) / 2.0,
        slope_fundamental=None if fundamental is None else fundamental[0],
        slope_im3_lower=None if lower is None else lower[0],
        slope_im3_upper=None if upper is None else upper[0],
        iip3_free_dbm=_free_iip3_dbm(fundamental, lower, upper),
        reason=None,
        **common,
    )
