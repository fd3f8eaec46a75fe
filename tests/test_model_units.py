"""The unit kinds of timbrel.model.units against their defining formulas."""

import numpy as np
import pytest
import scipy.special
import scipy.stats

from timbrel.model._kernels import stepped_softplus_sum
from timbrel.model.units import (
    BinaryHidden,
    BinaryVisible,
    GaussianVisible,
    RectifiedHidden,
    SteppedHidden,
    hidden_units,
    visible_units,
)

HIDDEN = [BinaryHidden(), SteppedHidden(1), SteppedHidden(7), RectifiedHidden()]


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261203)


def _definition_log_partial(units, x):
    """φ(x) = log Σ_h e^{xh} from its definition: softplus of each binary copy (offset
    −k + ½ for copy k), summed; the rectified unit as 400 copies (the rest < 1e-100)."""
    if isinstance(units, BinaryHidden):
        return np.logaddexp(0.0, x)
    n = units.n_copies if isinstance(units, SteppedHidden) else 400
    return sum(np.logaddexp(0.0, x - k + 0.5) for k in range(1, n + 1))


@pytest.mark.parametrize("units", HIDDEN, ids=repr)
def test_log_partial_matches_its_definition(rng, units):
    # Source: the definition of the stepped sigmoid unit's free energy (Nair & Hinton
    # 2010), computed with numpy.logaddexp; float32 inputs as training uses them.
    x = np.concatenate([rng.normal(0.0, 6.0, 2000), [-60.0, -0.5, 0.0, 0.5, 30.0]])
    x = x.astype(np.float32).reshape(5, -1)
    expected = _definition_log_partial(units, x.astype(np.float64))
    got = units.log_partial(x)
    assert got.dtype == np.float32
    np.testing.assert_allclose(got, expected, rtol=2e-6, atol=2e-6)


@pytest.mark.parametrize("units", HIDDEN, ids=repr)
def test_expectation_is_the_derivative_of_log_partial(rng, units):
    # Source: calculus, E[h | x] = dφ/dx for φ = log Σ_h e^{xh}; central differences of
    # the definition in float64, step 1e-3 (error O(step²) ≈ 1e-7).
    x = rng.normal(0.0, 4.0, (4, 50)).astype(np.float32)
    wide, step = x.astype(np.float64), 1e-3
    numeric = (_definition_log_partial(units, wide + step)
               - _definition_log_partial(units, wide - step)) / (2 * step)
    np.testing.assert_allclose(units.expectation(x), numeric, rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("units", [BinaryHidden(), SteppedHidden(5)], ids=repr)
def test_binary_copies_sample_their_exact_mean(rng, units):
    # Source: a binary copy on with probability sigmoid(x − k + ½) has that mean; the
    # average of 20 000 draws is within 5 standard errors (each copy's variance ≤ 1/4).
    x = np.tile(np.array([[-2.0, 0.0, 1.3, 4.0]], np.float32), (20000, 1))
    out, tmp, tmp2 = (np.empty_like(x) for _ in range(3))
    draws = units.sample(x, out, tmp, tmp2, rng)
    mean = units.mean(x[:1], np.empty_like(x[:1]), np.empty_like(x[:1]))[0]
    n_copies = getattr(units, "n_copies", 1)
    bound = 5 * np.sqrt(n_copies * 0.25 / len(x))
    assert np.all(np.abs(draws.mean(axis=0) - mean) < bound)
    assert set(np.unique(draws)) <= set(range(n_copies + 1))


def test_rectified_samples_have_the_noisy_relu_mean(rng):
    # Source: E[max(0, Y)] = μΦ(μ/s) + sφ(μ/s) for Y ~ N(μ, s²), with s² = sigmoid(μ)
    # (noisy rectified units, Nair & Hinton 2010); Φ, φ from scipy.stats.norm.
    mu = np.array([-1.5, 0.0, 0.7, 3.0])
    x = np.tile(mu.astype(np.float32), (40000, 1))
    out, tmp, tmp2 = (np.empty_like(x) for _ in range(3))
    draws = RectifiedHidden().sample(x, out, tmp, tmp2, rng)
    s = np.sqrt(scipy.special.expit(mu))
    expected = mu * scipy.stats.norm.cdf(mu / s) + s * scipy.stats.norm.pdf(mu / s)
    assert np.all(draws >= 0)
    np.testing.assert_allclose(draws.mean(axis=0), expected, atol=0.02)


@pytest.mark.parametrize("n_copies", [2, 7, 34, 120])
def test_stepped_sum_matches_logaddexp_in_float64(n_copies, rng):
    # Source: the definition, K calls of numpy.logaddexp(0, x − k + ½).
    x = np.concatenate([rng.normal(0.0, 25.0, 4000), [-1e3, 1e3, 0.0, 0.5, 1.5, -0.5,
                                                       n_copies - 0.5, n_copies + 0.5]])
    expected = sum(np.logaddexp(0.0, x - k + 0.5) for k in range(1, n_copies + 1))
    got = stepped_softplus_sum(x.reshape(1, -1), n_copies).ravel()
    np.testing.assert_allclose(got, expected, rtol=1e-14, atol=1e-11)


def test_gaussian_energy_and_binary_start_bias(rng):
    # Source: the Gaussian visible energy Σᵢ (vᵢ − bᵢ)²/(2σᵢ²) written out, and the
    # log-odds of the data mean as the binary visible bias (Hinton 2010, sec. 8), from
    # scipy.special.logit.
    v = rng.normal(size=(6, 5)).astype(np.float32)
    b = rng.normal(size=5).astype(np.float32)
    inv_var = rng.uniform(0.5, 2.0, 5).astype(np.float32)
    expected = 0.5 * ((v - b) ** 2 * inv_var).sum(axis=1)
    np.testing.assert_allclose(GaussianVisible().energy(v, b, inv_var), expected, rtol=1e-6)
    np.testing.assert_allclose(BinaryVisible().energy(v, b, inv_var), -(v @ b), rtol=1e-6)
    p = np.array([0.0, 0.2, 0.5, 1.0])
    np.testing.assert_allclose(BinaryVisible().start_bias(p),
                               scipy.special.logit(np.clip(p, 1e-3, 1 - 1e-3)))


def test_kinds_by_name():
    assert [type(hidden_units(k)).__name__ for k in ("relu", "binary", "stepped")] == [
        "RectifiedHidden", "BinaryHidden", "SteppedHidden"]
    assert hidden_units("stepped", 4).n_copies == 4
    assert visible_units("binary").has_variance is False
    with pytest.raises(ValueError, match="one of"):
        hidden_units("tanh")
    with pytest.raises(ValueError, match="one of"):
        visible_units("poisson")
