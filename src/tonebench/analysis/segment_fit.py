"""fit_with_points for many sweeps at once: the same valid region and fits, as segment reductions
over all the sweeps' points (sums per sweep by np.bincount on sweep ids, minima and maxima by
reduceat, the small-signal median from one sort by sweep and tone) instead of ~60 numpy calls
per sweep.

Sums run in another order than the one-sweep path (np.add.reduce, dot products), so means and
slopes may differ from fit_with_points in the last bits (about 1e-15 relative); masks, counts,
medians, P1dB and minima are the same operations point by point and agree exactly. A refused
fit (fewer than MIN_VALID_POINTS valid) is left to fit_with_points, which words its reason.
"""

from __future__ import annotations

import numpy as np

from tonebench.analysis.compression import COMPRESSION_DB
from tonebench.analysis.sweep_fit import (
    GAIN_TOLERANCE_DB,
    MIN_VALID_POINTS,
    SMALL_SIGNAL_POINTS,
    FitPoints,
    SweepResult,
)


def segment_ids(starts: np.ndarray, n_points: int) -> np.ndarray:
    """The sweep index of every point, for sweeps back to back starting at `starts` (none empty)."""
    ids = np.zeros(n_points, np.intp)
    ids[starts[1:]] = 1
    return np.cumsum(ids)


def _small_signal_gain_db(seg, n_seg, tone_dbm, gain_db, usable) -> tuple[np.ndarray, np.ndarray]:
    """Per sweep, sweep_fit.small_signal_gain_db: the median gain of its (up to) SMALL_SIGNAL_POINTS
    lowest-tone usable points; returns (gain, has_one). One stable sort by sweep, then tone."""
    idx = np.flatnonzero(usable)
    idx = idx[np.lexsort((tone_dbm[idx], seg[idx]))]  # lexsort is stable: ties keep point order
    s = seg[idx]
    counts = np.bincount(s, minlength=n_seg)
    first = np.concatenate(([0], np.cumsum(counts)[:-1]))
    rank = np.arange(idx.size) - first[s]
    taken = np.minimum(counts, SMALL_SIGNAL_POINTS)
    g = gain_db[idx]
    # The sorted 1, 2 or 3 lowest-tone gains: median is the middle one, or (a + b) / 2 of two.
    lowest = np.full((n_seg, SMALL_SIGNAL_POINTS), np.nan)
    keep = rank < SMALL_SIGNAL_POINTS
    lowest[s[keep], rank[keep]] = g[keep]
    lowest.sort(axis=1)  # NaN (absent) last
    gss = np.full(n_seg, np.nan)
    odd = taken % 2 == 1
    rows = np.arange(n_seg)
    gss[odd] = lowest[rows[odd], taken[odd] // 2]
    two = taken == 2
    gss[two] = (lowest[two, 0] + lowest[two, 1]) / 2.0
    return gss, taken > 0


def _p1db(seg, n_seg, pin_dbm, gain_db, gss, has_gss) -> tuple[np.ndarray, np.ndarray]:
    """Per sweep, compression.p1db(pin, gain, gss): NaN where it gives None."""
    keep = np.isfinite(pin_dbm) & np.isfinite(gain_db) & has_gss[seg]
    idx = np.flatnonzero(keep)
    idx = idx[np.lexsort((pin_dbm[idx], seg[idx]))]
    s, pin, gain = seg[idx], pin_dbm[idx], gain_db[idx]
    target_db = gss - COMPRESSION_DB
    below = gain <= target_db[s]
    pos = np.arange(idx.size)
    first_kept = np.full(n_seg, idx.size)
    np.minimum.at(first_kept, s, pos)
    first_below = np.full(n_seg, idx.size)
    np.minimum.at(first_below, s[below], pos[below])
    ok = (first_below < idx.size) & (first_below > first_kept)
    k = first_below[ok]
    t = target_db[ok]
    frac = (gain[k - 1] - t) / (gain[k - 1] - gain[k])
    pin_1db = np.full(n_seg, np.nan)
    pin_1db[ok] = pin[k - 1] + frac * (pin[k] - pin[k - 1])
    out_1db = np.full(n_seg, np.nan)
    out_1db[ok] = pin_1db[ok] + t
    return pin_1db, out_1db


def _lines(seg, n_seg, x, ys, counts) -> list[tuple[np.ndarray, np.ndarray]]:
    """Per sweep, the least-squares line (slope, offset) of each y over x (valid points only,
    already picked out), as sweep_fit._line: slope = sum dx (y - y_mean) / sum dx^2."""
    x_mean = np.bincount(seg, weights=x, minlength=n_seg) / counts
    dx = x - x_mean[seg]
    sxx = np.bincount(seg, weights=dx * dx, minlength=n_seg)
    out = []
    for y in ys:
        y_mean = np.bincount(seg, weights=y, minlength=n_seg) / counts
        with np.errstate(invalid="ignore", divide="ignore"):
            slope = np.bincount(seg, weights=dx * (y - y_mean[seg]), minlength=n_seg) / sxx
        out.append((slope, y_mean - slope * x_mean))
    return out


def _opt(value) -> float | None:
    return None if np.isnan(value) else float(value)


def fit_segments(a: dict[str, np.ndarray], points: FitPoints, over: np.ndarray, excluded: np.ndarray,
                 starts: np.ndarray) -> list[SweepResult | None]:
    """fit_with_points of every sweep (points back to back from `starts`, none empty) with overload
    `over` and the further exclusions `excluded` (bool per point); None where the fit is refused."""
    n_points = a["tone_dbm"].size
    n_seg = starts.size
    seg = segment_ids(starts, n_points)
    stops = np.append(starts[1:], n_points)
    pts = points.pts
    gain = pts.gain_db
    gss, has_gss = _small_signal_gain_db(seg, n_seg, a["tone_dbm"], gain, points.finite & ~over)
    with np.errstate(invalid="ignore"):
        gain_ok = has_gss[seg] & (np.abs(gain - gss[seg]) <= GAIN_TOLERANCE_DB)
    valid = points.finite & ~points.noisy & gain_ok & ~over & ~excluded
    n_valid = np.bincount(seg[valid], minlength=n_seg)
    p1db_in, p1db_out = _p1db(seg, n_seg, np.where(over, np.nan, points.pin_mean_dbm), gain, gss, has_gss)

    tone = a["tone_dbm"]
    tone_min = np.minimum.reduceat(np.where(valid, tone, np.inf), starts)
    tone_max = np.maximum.reduceat(np.where(valid, tone, -np.inf), starts)
    pin_mean = points.pin_mean_dbm
    x_min = np.minimum.reduceat(np.where(valid, pin_mean, np.inf), starts)
    x_max = np.maximum.reduceat(np.where(valid, pin_mean, -np.inf), starts)
    spread = x_max - x_min > 0

    vs = seg[valid]
    counts = np.maximum(n_valid, 1)
    means = [np.bincount(vs, weights=v[valid], minlength=n_seg) / counts
             for v in (pts.iip3_lower_dbm, pts.iip3_upper_dbm, pts.oip3_lower_dbm, pts.oip3_upper_dbm)]
    lines = _lines(vs, n_seg, pin_mean[valid],
                   [y[valid] for y in (points.pout_mean_dbm, points.im3_lower_dbm, points.im3_upper_dbm)], counts)
    (s1, c1), (sl, cl), (su, cu) = lines
    with np.errstate(invalid="ignore", divide="ignore"):
        free_lower = (c1 - cl) / (sl - s1)
        free_upper = (c1 - cu) / (su - s1)
        converge = spread & (sl - s1 > 0) & (su - s1 > 0)
    point_iip3 = (pts.iip3_lower_dbm + pts.iip3_upper_dbm) / 2.0

    out: list[SweepResult | None] = []
    for i in range(n_seg):
        n = int(n_valid[i])
        if n < MIN_VALID_POINTS:
            out.append(None)
            continue
        part = slice(int(starts[i]), int(stops[i]))
        iip3_lower, iip3_upper, oip3_lower, oip3_upper = (float(m[i]) for m in means)
        has_line = bool(spread[i])
        out.append(SweepResult(
            n_points=part.stop - part.start, n_valid=n, valid_mask=valid[part], gain_db=float(gss[i]),
            point_gain_db=gain[part], point_iip3_dbm=point_iip3[part],
            p1db_in_dbm=_opt(p1db_in[i]), p1db_out_dbm=_opt(p1db_out[i]),
            valid_tone_min_dbm=float(tone_min[i]), valid_tone_max_dbm=float(tone_max[i]),
            iip3_lower_dbm=iip3_lower, iip3_upper_dbm=iip3_upper, iip3_dbm=(iip3_lower + iip3_upper) / 2.0,
            oip3_lower_dbm=oip3_lower, oip3_upper_dbm=oip3_upper, oip3_dbm=(oip3_lower + oip3_upper) / 2.0,
            slope_fundamental=float(s1[i]) if has_line else None,
            slope_im3_lower=float(sl[i]) if has_line else None,
            slope_im3_upper=float(su[i]) if has_line else None,
            iip3_free_dbm=float((free_lower[i] + free_upper[i]) / 2.0) if converge[i] else None,
            reason=None))
    return out
