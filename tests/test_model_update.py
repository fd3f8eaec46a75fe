"""Tests of timbrel.model._update: the update rule's weight decay."""

import numpy as np
import pytest

from timbrel.model._update import WeightDecay


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20240611)


@pytest.mark.parametrize("rate", [1e-3, 1e-4, 1e-5])
def test_weight_decay_is_not_lost_to_float32_rounding(rng, rate):
    # Source: algebra: N updates W <- (1 - rate*decay) W give W * (1 - rate*decay)^N. At
    # rate*decay <= 1e-7 one update's factor rounds to 1 - 1.19e-7 or to exactly 1 in
    # float32 (machine epsilon 1.19e-7, IEEE 754), so it must be gathered before use.
    weights = rng.standard_normal((5, 4)).astype(np.float32)
    start = weights.astype(np.float64)
    n_batches = 3000
    decay = WeightDecay()
    for _ in range(n_batches):
        decay.add(weights, rate, 1e-4)
    decay.flush(weights)
    expected = start * (1.0 - rate * 1e-4) ** n_batches
    # each application rounds its factor and the product to float32: 2 half-ulps each
    applications = np.ceil(n_batches * rate * 1e-4 / 1e-5) + 1
    np.testing.assert_allclose(weights, expected, rtol=applications * 2.0**-23)
    assert not np.array_equal(weights, start.astype(np.float32))
