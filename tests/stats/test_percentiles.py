"""Weighted percentiles: equal weights reproduce numpy's default method."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from covextract.engine.finish import weighted_percentiles

QS = [0, 1, 10, 25, 33.3, 50, 75, 90, 99, 100]


def _triples(groups, weights=None):
    unit = np.concatenate([np.full(len(g), i) for i, g in enumerate(groups)])
    vals = np.concatenate([np.sort(g) for g in groups])
    w = np.ones_like(vals) if weights is None else weights
    return unit, vals, w


def test_equal_weights_equal_numpy_linear_percentile():
    # Reference: numpy.percentile, method="linear" (its default; Hyndman & Fan 1996 type 7).
    rng = np.random.default_rng(1)
    groups = [rng.normal(size=n) for n in (1, 2, 3, 7, 50, 101)]
    unit, vals, w = _triples(groups)
    got = weighted_percentiles(unit, vals, w * 0.37, len(groups), QS)
    for i, g in enumerate(groups):
        assert_allclose(got[:, i], np.percentile(g, QS, method="linear"), rtol=0, atol=1e-12)


def test_ties_and_missing_units():
    unit = np.array([0, 0, 0, 2, 2])
    vals = np.array([1.0, 1.0, 3.0, 5.0, 5.0])
    got = weighted_percentiles(unit, vals, np.ones(5), 4, [50])
    assert_allclose(got[0, [0, 2]], [np.percentile([1, 1, 3], 50), 5.0])
    assert np.isnan(got[0, 1]) and np.isnan(got[0, 3])


def test_weights_shift_the_median_towards_heavy_values():
    unit = np.zeros(3, dtype=int)
    vals = np.array([0.0, 1.0, 2.0])
    light = weighted_percentiles(unit, vals, np.array([1.0, 1.0, 1.0]), 1, [50])[0, 0]
    heavy = weighted_percentiles(unit, vals, np.array([1.0, 1.0, 8.0]), 1, [50])[0, 0]
    assert light == 1.0
    assert heavy > 1.0


@pytest.mark.parametrize("seed", range(5))
def test_weighted_percentiles_are_monotone_and_bounded(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 40))
    vals = np.sort(rng.normal(size=n))
    w = rng.uniform(0.01, 2.0, size=n)
    got = weighted_percentiles(np.zeros(n, dtype=int), vals, w, 1, QS)[:, 0]
    assert np.all(np.diff(got) >= -1e-12)
    assert got[0] == vals[0] and got[-1] == vals[-1]
