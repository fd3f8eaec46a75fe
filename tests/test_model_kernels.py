"""Tests of timbrel.model._kernels: the in-place kernels and bulk draws."""

import numpy as np
import pytest

from timbrel.model._kernels import relu, standard_normal, uniform_fill


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20240611)


@pytest.mark.parametrize("variance", [0.5, 2.0])
@pytest.mark.parametrize("size", [10, 11])
def test_normal_draws_scale_with_the_variance_asked(variance, size):
    # Source: algebra, N(0, v) = √v · N(0, 1): the same uniforms give the unit draws
    # times √v (float32 rounding of the radius's square aside), for even and odd sizes.
    unit = standard_normal(np.random.default_rng(3), np.empty(size, np.float32),
                            np.empty(size, np.float32))
    scaled = standard_normal(np.random.default_rng(3), np.empty(size, np.float32),
                              np.empty(size, np.float32), variance=variance)
    np.testing.assert_allclose(scaled, np.sqrt(variance) * unit, rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("shape", [(3, 5), (128, 64), (1, 1)])
def test_rectifier_matches_numpys_maximum_against_zero(rng, shape):
    # Source: numpy's maximum(x, 0), the definition the faster array form replaces.
    x = rng.standard_normal(shape).astype(np.float32)
    x.flat[0] = -0.0
    expected = np.maximum(x, 0.0)
    np.testing.assert_array_equal(relu(x, np.empty_like(x)), expected)
    relu(x, x)  # in place
    np.testing.assert_array_equal(x, expected)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_bulk_uniforms_are_numpys_own_float32_uniforms(seed):
    # Source: numpy's Generator.random(dtype=float32), the reference: the bulk path must
    # give the very same numbers and leave the generator where numpy leaves it, also
    # for odd counts (a half word kept for the next draw) and between other draws.
    ours, reference = np.random.default_rng(seed), np.random.default_rng(seed)
    plan = np.random.default_rng(100 + seed)
    for _ in range(60):
        kind = int(plan.integers(0, 3))
        if kind == 0:
            shape = tuple(int(k) for k in plan.integers(0, 40, size=int(plan.integers(1, 3))))
            got = uniform_fill(ours, np.empty(shape, np.float32))
            np.testing.assert_array_equal(got, reference.random(shape, dtype=np.float32))
            assert got.size == 0 or (got.min() >= 0.0 and got.max() < 1.0)
        elif kind == 1:  # bounded integers draw 32-bit halves too
            m = int(plan.integers(1, 30))
            np.testing.assert_array_equal(ours.permutation(m), reference.permutation(m))
        else:
            np.testing.assert_array_equal(ours.standard_normal(3, dtype=np.float32),
                                          reference.standard_normal(3, dtype=np.float32))
    np.testing.assert_array_equal(ours.random(5), reference.random(5))
    strided = np.zeros((6, 8), np.float32)[:, ::2]  # not contiguous: filled all the same
    np.testing.assert_array_equal(uniform_fill(ours, strided),
                                  reference.random((6, 4), dtype=np.float32))
