"""segment_fit.fit_segments (the valid-region fit of many sweeps as segment reductions) against
sweep_fit.fit_with_points sweep by sweep, on random sweeps made to hit each rule: missing readings,
IM3 in the noise, overload, exclusions, compression and expansion, repeated tones, one input power
only (no slope), refusals, and P1dB found, not reached or already passed at the lowest power."""

import dataclasses
import math

import numpy as np

from tonebench.analysis.segment_fit import fit_segments, segment_ids
from tonebench.analysis.sweep_fit import FIT_INPUTS, fit_points, fit_with_points


def random_sweep(rng: np.random.Generator) -> dict[str, np.ndarray]:
    """A cubic-like DUT sweep (gain 15 dB, IIP3 near 0 dBm) with random faults."""
    n = int(rng.integers(1, 14))
    tone = np.round(rng.uniform(-40.0, -5.0, n) if rng.random() < 0.3 else np.linspace(-40.0, -40.0 + 2.0 * (n - 1), n), 0)
    pin1 = tone + rng.normal(0.0, 0.05, n)
    pin2 = tone + rng.normal(0.0, 0.05, n)
    if rng.random() < 0.1:
        tone[:], pin1[:], pin2[:] = tone[0], pin1[0], pin2[0]  # one input power: no spread, no slope
    squeeze = np.maximum(0.0, tone + 20.0) * rng.uniform(0.0, 0.2)  # compression at the top
    pout1 = pin1 + 15.0 - squeeze + rng.normal(0.0, 0.05, n)
    pout2 = pin2 + 15.0 - squeeze + rng.normal(0.0, 0.05, n)
    im3 = 3.0 * tone + 15.0 + rng.normal(0.0, 0.3, (2, n))
    noise = np.full((2, n), rng.uniform(-140.0, -95.0))
    a = dict(tone_dbm=tone, pin1_dbm=pin1, pin2_dbm=pin2, pout_f1_dbm=pout1, pout_f2_dbm=pout2,
             im3_lower_dbm=im3[0], im3_upper_dbm=im3[1], noise_lower_dbm=noise[0], noise_upper_dbm=noise[1])
    for name in FIT_INPUTS[:7]:
        a[name][rng.random(n) < 0.05] = np.nan
    if rng.random() < 0.2:
        a["pout_f1_dbm"][rng.integers(n)] += 1.0  # expansion at one point
    if rng.random() < 0.2:  # the lowest point 1 dB down already: P1dB passed before the sweep starts
        for name in ("pout_f1_dbm", "pout_f2_dbm"):
            a[name][np.argmin(tone)] -= 3.0
    a["overload"] = rng.random(n) < 0.1
    return a


def test_segment_fits_are_the_sweep_by_sweep_fits():
    rng = np.random.default_rng(11)
    sweeps = [random_sweep(rng) for _ in range(400)]
    excluded = [rng.random(s["tone_dbm"].size) < 0.1 for s in sweeps]
    joined = {name: np.concatenate([s[name] for s in sweeps]) for name in sweeps[0]}
    sizes = [s["tone_dbm"].size for s in sweeps]
    starts = np.concatenate(([0], np.cumsum(sizes)[:-1])).astype(np.intp)
    together = fit_segments(joined, fit_points(joined), joined["overload"], np.concatenate(excluded), starts)
    kinds = {"refused": 0, "fitted": 0, "p1db": 0, "no slope": 0}
    for sweep, skip, got in zip(sweeps, excluded, together):
        alone = fit_with_points(sweep, fit_points(sweep), {"excluded": skip})
        if alone.iip3_dbm is None:
            assert got is None  # left to fit_with_points, which words the reason
            kinds["refused"] += 1
            continue
        kinds["fitted"] += 1
        kinds["p1db"] += alone.p1db_in_dbm is not None
        kinds["no slope"] += alone.slope_fundamental is None
        for field in dataclasses.fields(alone):
            want, have = getattr(alone, field.name), getattr(got, field.name)
            if isinstance(want, np.ndarray):
                np.testing.assert_array_equal(have, want, err_msg=field.name)
            elif isinstance(want, float):
                assert isinstance(have, float) and math.isclose(have, want, rel_tol=1e-9, abs_tol=1e-12), field.name
            else:
                assert have == want, field.name
    # Each kind of sweep occurred, so each branch was compared.
    assert min(kinds.values()) >= 5, kinds


def test_segment_ids_number_the_sweeps_from_their_first_points():
    assert segment_ids(np.array([0, 2, 3]), 6).tolist() == [0, 0, 1, 2, 2, 2]
