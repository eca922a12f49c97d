"""The intercept bound: Student t quantiles, the scatter term, and how terms combine."""

import math

import numpy as np
import pytest

from tonebench.analysis.uncertainty import combine, scatter_half_width_db, t95


@pytest.mark.parametrize("n", [3, 4, 6, 10])
def test_t95_gives_95_percent_coverage_of_a_mean(n):
    # Monte Carlo with numpy's normal generator: the mean of n normal samples lies within
    # t95(n-1) * s / sqrt(n) of the true mean in 95 % of the trials.
    rng = np.random.default_rng(n)
    samples = rng.normal(0.0, 1.0, size=(200_000, n))
    half = t95(n - 1) * samples.std(axis=1, ddof=1) / math.sqrt(n)
    coverage = float(np.mean(np.abs(samples.mean(axis=1)) <= half))
    assert coverage == pytest.approx(0.95, abs=0.004)


def test_scatter_half_width():
    values = np.array([1.0, 1.2, 0.9, 1.1])
    assert scatter_half_width_db(values) == pytest.approx(t95(3) * np.std(values, ddof=1) / 2.0)
    assert scatter_half_width_db([1.0]) == 0.0
    assert scatter_half_width_db([1.0, np.nan, 1.0]) == 0.0


def test_combine_adds_systematic_and_root_sum_squares_random():
    bound = combine({"level": 0.1, "source": 0.3, "analyzer": 0.05, "compression": 0.05, "scatter": 0.3, "noise": 0.4})
    assert bound.half_width_db == pytest.approx(0.1 + 0.3 + 0.05 + 0.05 + 0.5)
    with pytest.raises(ValueError):
        combine({"weather": 1.0})
    with pytest.raises(ValueError):
        t95(0)
