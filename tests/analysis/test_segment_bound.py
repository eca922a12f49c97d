"""segment_bound.bound_terms_segments (the IIP3 bound's terms of many sweeps as segment reductions)
against bound.bound_terms_db sweep by sweep, on random fitted sweeps with random per-point errors:
compression with ties and zeros (the stable "more compressed half"), unbounded noise errors, NaN
intercepts outside the fit, sweeps without an intercept."""

import math

import numpy as np
from test_segment_fit import random_sweep

from tonebench.analysis.bound import bound_terms_db
from tonebench.analysis.segment_bound import bound_terms_segments
from tonebench.analysis.segment_fit import segment_ids
from tonebench.analysis.sweep_fit import fit_points, fit_with_points


def test_segment_terms_are_the_sweep_by_sweep_terms():
    rng = np.random.default_rng(5)
    sweeps = [random_sweep(rng) for _ in range(300)]
    fits = [fit_with_points(s, fit_points(s)) for s in sweeps]
    sizes = [s["tone_dbm"].size for s in sweeps]
    errors = [{"source": rng.uniform(0.0, 0.2, n), "analyzer": rng.uniform(0.0, 0.1, n),
               "compression": np.round(rng.uniform(-0.1, 0.3, n).clip(0.0), 1),  # ties, zeros
               "noise": np.where(rng.random(n) < 0.03, np.inf, rng.uniform(0.0, 0.3, n))} for n in sizes]
    levels = rng.uniform(0.2, 1.0, len(sweeps)).tolist()
    starts = np.concatenate(([0], np.cumsum(sizes)[:-1])).astype(np.intp)
    joined = {k: np.concatenate([e[k] for e in errors]) for k in errors[0]}
    together = bound_terms_segments(
        segment_ids(starts, sum(sizes)), len(sweeps), np.array([f.iip3_dbm is not None for f in fits]),
        np.concatenate([f.valid_mask for f in fits]), np.concatenate([f.point_iip3_dbm for f in fits]), levels,
        joined["source"], joined["analyzer"], joined["compression"], joined["noise"])
    seen = {"none": 0, "terms": 0, "shift wins": 0, "unbounded noise": 0}
    for fit, e, level, got in zip(fits, errors, levels, together):
        want = bound_terms_db(fit, level, e["source"], e["analyzer"], e["compression"], e["noise"])
        assert got.keys() == want.keys()
        seen["none" if not want else "terms"] += 1
        if want:
            mean_c = float(np.mean(e["compression"][fit.valid_mask]))
            seen["shift wins"] += want["compression"] > mean_c
            seen["unbounded noise"] += math.isinf(want["noise"])
        for name, value in want.items():
            assert math.isclose(got[name], value, rel_tol=1e-9, abs_tol=1e-12), (name, got[name], value)
    assert min(seen.values()) >= 3, seen
