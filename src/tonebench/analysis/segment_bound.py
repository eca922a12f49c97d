"""bound.bound_terms_db for many sweeps at once, as segment reductions over all their points:
means and sums of squares per sweep by np.bincount on sweep ids, the compression term's "more
compressed half" from one stable sort by sweep and compression. Sums run in another order than
the one-sweep path, so terms may differ from it in the last bits (about 1e-15 relative).
"""

from __future__ import annotations

import math

import numpy as np

from tonebench.analysis.uncertainty import t95


def _per_sweep_sum(seg: np.ndarray, values: np.ndarray, n_seg: int) -> np.ndarray:
    return np.bincount(seg, weights=values, minlength=n_seg)


def bound_terms_segments(seg: np.ndarray, n_seg: int, fitted: np.ndarray, valid: np.ndarray, point_iip3_dbm,
                         level_accuracy_db: list[float], source_err, analyzer_err, compression_db,
                         noise_err) -> list[dict[str, float]]:
    """bound_terms_db of every sweep (seg: each point's sweep; fitted: per sweep, whether it has an
    intercept; valid: each point in its sweep's fitted region; the rest per point as bound_terms_db
    takes them, all the sweeps' points back to back)."""
    vs = seg[valid]
    n = np.bincount(vs, minlength=n_seg)
    counts = np.maximum(n, 1)
    source = _per_sweep_sum(vs, source_err[valid], n_seg) / counts
    analyzer = _per_sweep_sum(vs, analyzer_err[valid], n_seg) / counts
    noise = np.sqrt(_per_sweep_sum(vs, noise_err[valid] ** 2, n_seg)) / counts

    # compression_shift_db: the mean compression, and the intercept's shift without the more
    # compressed half (from 4 fitted points up).
    comp = compression_db[valid]
    values = point_iip3_dbm[valid]
    mean_c = _per_sweep_sum(vs, comp, n_seg) / counts
    mean_all = _per_sweep_sum(vs, values, n_seg) / counts
    order = np.lexsort((comp, vs))  # stable: ties keep point order, as argsort(kind="stable")
    first = np.concatenate(([0], np.cumsum(n)[:-1]))
    rank = np.empty(vs.size, np.intp)
    rank[order] = np.arange(vs.size) - first[vs[order]]
    half = (n + 1) // 2
    kept = rank < half[vs]
    mean_kept = _per_sweep_sum(vs[kept], values[kept], n_seg) / np.maximum(half, 1)

    # scatter_half_width_db: t95(n-1) s / sqrt(n) of the finite intercepts (s: two-pass, as np.std).
    finite = np.isfinite(values)
    fs, fv = vs[finite], values[finite]
    m = np.bincount(fs, minlength=n_seg)
    mean_f = _per_sweep_sum(fs, fv, n_seg) / np.maximum(m, 1)
    dev2 = _per_sweep_sum(fs, (fv - mean_f[fs]) ** 2, n_seg)

    out: list[dict[str, float]] = []
    for i in range(n_seg):
        if not fitted[i]:
            out.append({})
            continue
        c = float(mean_c[i])
        compression = c if n[i] < 4 else max(abs(float(mean_all[i] - mean_kept[i])), c)
        k = int(m[i])
        scatter = 0.0 if k < 2 else t95(k - 1) * math.sqrt(float(dev2[i]) / (k - 1)) / math.sqrt(k)
        out.append({"level": level_accuracy_db[i] / 2.0, "source": float(source[i]), "analyzer": float(analyzer[i]),
                    "compression": compression, "scatter": scatter, "noise": float(noise[i])})
    return out
