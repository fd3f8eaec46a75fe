# ruff: noqa: RUF002, RUF003  (docstrings and comments use math notation: σ, −, ×)
"""Tests of timbrel.model, each checked against a reference outside the project.

References used below, named again beside each check:
- closed-form Gaussian integrals and explicit enumeration of hidden states (textbook);
- scipy.integrate (quadrature), scipy.stats (normal distribution, KS test);
- scikit-learn's BernoulliRBM (free energy and transform of a binary RBM);
- Nair & Hinton 2010 (stepped sigmoid units ≈ softplus, noisy rectified units);
- Cho, Ilin & Raiko 2011 (Gaussian-visible energy with σ as standard deviation);
- Hinton 2010, "A practical guide to training RBMs" (schedules, common practice);
- the Euler–Maclaurin formula for the midpoint rule (textbook numerical analysis).
"""

from __future__ import annotations

import itertools
import json
import os
import warnings
import zipfile

import numpy as np
import pytest
import scipy.integrate
import scipy.special
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from timbrel._errors import (
    DivergenceError,
    ModelFileError,
    NotFittedError,
    ParameterError,
)
from timbrel.model import (
    FORMAT_VERSION,
    RBM,
    DivergenceWarning,
    ModelFile,
    read_model_file,
)


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20240611)


def random_model(rng, *, n_visible=3, n_hidden=6, hidden="binary", visible="gaussian",
                 tie_variance="unit", layout=None, scale=0.6, n_copies=10):
    """An initialised RBM with random (moderate) parameters."""
    model = RBM(n_hidden=n_hidden, hidden=hidden, visible=visible, tie_variance=tie_variance,
                layout=layout, n_copies=n_copies, seed=0)
    model.initialize(n_visible)
    model.weights_ = (scale * rng.standard_normal((n_visible, n_hidden))).astype(np.float32)
    model.visible_bias_ = (0.5 * rng.standard_normal(n_visible)).astype(np.float32)
    model.hidden_bias_ = (0.5 * rng.standard_normal(n_hidden)).astype(np.float32)
    if visible == "gaussian":
        if tie_variance == "band" and layout is not None:
            per_band = rng.uniform(0.6, 1.5, layout[1])
            model.sigma_ = np.tile(per_band, layout[0]).astype(np.float32)
        else:
            model.sigma_ = rng.uniform(0.6, 1.5, n_visible).astype(np.float32)
    return model


def float64_params(model):
    return (model.weights_.astype(np.float64), model.visible_bias_.astype(np.float64),
            model.hidden_bias_.astype(np.float64), np.asarray(model.sigma_, np.float64) ** 2)


def all_hidden_states(n_hidden):
    return np.array(list(itertools.product([0, 1], repeat=n_hidden)), dtype=np.float64)


def reference_energy(v, h, weights, b, c, var):
    """E(v, h) of Cho, Ilin & Raiko 2011, written out independently of the model code."""
    quadratic = ((v[:, None, :] - b) ** 2 / (2 * var)).sum(-1)
    return quadratic - h @ c - np.einsum("ni,ij,kj->nk", v / var, weights, h)


def reference_log_partition(weights, b, c, var):
    """log Z = log Σ_h ∫ exp(−E(v, h)) dv, Gaussian integral in closed form per h."""
    states = all_hidden_states(weights.shape[1])
    mean = b + states @ weights.T
    log_terms = states @ c + ((mean**2 - b**2) / (2 * var)).sum(1)
    return scipy.special.logsumexp(log_terms) + 0.5 * np.log(2 * np.pi * var).sum()


# --------------------------------------------------------------------------------------
# 1. exact likelihood of a tiny Gaussian-visible model
# --------------------------------------------------------------------------------------


def test_free_energy_equals_enumerated_marginal(rng):
    # Source: definition F(v) = −log Σ_h exp(−E(v, h)) (Cho, Ilin & Raiko 2011), by
    # enumerating all 2^8 hidden states in float64.
    model = random_model(rng, n_visible=3, n_hidden=8)
    weights, b, c, var = float64_params(model)
    v = rng.normal(0.5, 1.3, (40, 3))
    energies = reference_energy(v, all_hidden_states(8), weights, b, c, var)
    expected = -scipy.special.logsumexp(-energies, axis=1)
    np.testing.assert_allclose(model.free_energy(v), expected, rtol=2e-6, atol=2e-5)


def test_binary_visible_free_energy_equals_enumerated_marginal(rng):
    # Source: E = −b·v − c·h − vᵀWh, enumerated over all 2^7 hidden states.
    model = random_model(rng, n_visible=5, n_hidden=7, visible="binary", scale=1.0)
    weights, b, c, _ = float64_params(model)
    v = (rng.random((30, 5)) < 0.5).astype(np.float64)
    states = all_hidden_states(7)
    energies = -(v @ b)[:, None] - states @ c - np.einsum("ni,ij,kj->nk", v, weights, states)
    expected = -scipy.special.logsumexp(-energies, axis=1)
    np.testing.assert_allclose(model.free_energy(v), expected, rtol=2e-6, atol=2e-5)


def test_log_partition_agrees_with_closed_form_and_quadrature(rng):
    model = random_model(rng, n_visible=2, n_hidden=5)
    weights, b, c, var = float64_params(model)
    closed_form = reference_log_partition(weights, b, c, var)
    # Source: Gaussian integral in closed form for each of the 2^5 hidden states.
    assert model.exact_log_partition() == pytest.approx(closed_form, rel=1e-10)

    # Source: scipy.integrate.dblquad of Σ_h exp(−E(v, h)) over a box holding all mass.
    states = all_hidden_states(5)

    def density(v2, v1):
        energies = reference_energy(np.array([[v1, v2]]), states, weights, b, c, var)
        return float(np.exp(-energies - closed_form).sum())

    centres = b + states @ weights.T
    spread = 9 * np.sqrt(var)
    low, high = centres.min(0) - spread, centres.max(0) + spread
    mass, _ = scipy.integrate.dblquad(density, low[0], high[0], low[1], high[1],
                                      epsabs=1e-10, epsrel=1e-8)
    assert mass == pytest.approx(1.0, abs=1e-6)


def test_exact_log_likelihood(rng):
    # log p(v) = −F(v) − log Z from the model against the enumerated joint (float64).
    model = random_model(rng, n_visible=4, n_hidden=10)
    weights, b, c, var = float64_params(model)
    v = rng.normal(0.0, 1.5, (25, 4))
    energies = reference_energy(v, all_hidden_states(10), weights, b, c, var)
    expected = scipy.special.logsumexp(-energies, axis=1) - reference_log_partition(
        weights, b, c, var)
    got = -model.free_energy(v).astype(np.float64) - model.exact_log_partition()
    np.testing.assert_allclose(got, expected, rtol=1e-5, atol=5e-5)


def exact_gradient(model, data):
    """Exact ∂ mean log p / ∂θ (θ = W, b, c, z = log σ²) by enumeration, float64.

    Data term −⟨∂F/∂θ⟩ with E[h|v] = sigmoid(x); model term −⟨∂E/∂θ⟩ over p(v, h), using
    E[v|h] = b + Wh and E[(v−b)² | h] = σ² + (Wh)² (Gaussian moments).
    """
    weights, b, c, var = float64_params(model)
    v = data.astype(np.float64)
    hidden_mean = scipy.special.expit(c + (v / var) @ weights)
    data_w = (v / var).T @ hidden_mean / len(v)
    data_b = ((v - b) / var).mean(0)
    data_c = hidden_mean.mean(0)
    data_z = (((v - b) ** 2 / 2 - v * (hidden_mean @ weights.T)) / var).mean(0)
    states = all_hidden_states(weights.shape[1])
    shift = states @ weights.T
    log_p = states @ c + (((b + shift) ** 2 - b**2) / (2 * var)).sum(1)
    p = np.exp(log_p - scipy.special.logsumexp(log_p))
    model_w = ((b + shift) / var).T @ (states * p[:, None])
    model_b = (p[:, None] * shift / var).sum(0)
    model_c = p @ states
    model_z = (p[:, None] * ((var + shift**2) / 2 - (b + shift) * shift)).sum(0) / var
    return np.concatenate([(data_w - model_w).ravel(), data_b - model_b, data_c - model_c,
                           data_z - model_z])


def test_long_chain_cd_gradient_approaches_exact_gradient(rng):
    # Source: exact gradient by enumeration (above).  CD-k with k → ∞ is the maximum-
    # likelihood gradient; 50 Gibbs steps on 8000 chains leave Monte Carlo noise only.
    model = random_model(rng, n_visible=3, n_hidden=6)
    data = rng.normal(0.8, 1.3, (400, 3)).astype(np.float32)
    exact = exact_gradient(model, data)
    grad = model.cd_gradient(np.tile(data, (20, 1)), n_steps=50, rng=3)
    # each parameter block on its own, so a small block (z) cannot hide behind W
    blocks = np.cumsum([0, 18, 3, 6, 3])
    for k, name in enumerate(["weights", "visible_bias", "hidden_bias", "log_variance"]):
        estimate = grad[name].ravel().astype(np.float64)
        reference = exact[blocks[k]:blocks[k + 1]]
        cosine = estimate @ reference / np.linalg.norm(estimate) / np.linalg.norm(reference)
        assert cosine > 0.999, name
        assert np.linalg.norm(estimate - reference) / np.linalg.norm(reference) < 0.05, name


# --------------------------------------------------------------------------------------
# 2. finite differences of the free energy
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("hidden", ["binary", "stepped", "relu"])
@pytest.mark.parametrize("tie_variance", ["band", "unit"])
def test_free_energy_gradient_matches_finite_differences(rng, hidden, tie_variance):
    # Source: central finite differences (textbook).  float32 evaluation: F ≈ 10 with
    # rounding ~1e-6 and step 1e-2 gives ~1e-4 absolute error; truncation is O(h²).
    layout = (2, 3)
    model = random_model(rng, n_visible=6, n_hidden=5, hidden=hidden,
                         tie_variance=tie_variance, layout=layout, scale=0.8, n_copies=6)
    data = rng.normal(0.0, 1.2, (16, 6)).astype(np.float32)
    analytic = model.free_energy_gradient(data)
    step = 1e-2

    def mean_free_energy():
        return float(model.free_energy(data).astype(np.float64).mean())

    def numeric(array):
        grad = np.zeros(array.shape)
        for index in np.ndindex(array.shape):
            original = array[index]
            array[index] = original + step
            up = mean_free_energy()
            array[index] = original - step
            down = mean_free_energy()
            array[index] = original
            grad[index] = (up - down) / (2 * step)
        return grad

    for name, array in (("weights", model.weights_), ("visible_bias", model.visible_bias_),
                        ("hidden_bias", model.hidden_bias_)):
        np.testing.assert_allclose(analytic[name], numeric(array), rtol=2e-3, atol=3e-4,
                                   err_msg=name)

    log_var = np.log(np.asarray(model.sigma_, np.float64) ** 2)
    grouped = log_var[: layout[1]] if tie_variance == "band" else log_var.copy()
    fd = np.zeros_like(grouped)
    for k in range(grouped.size):
        values = []
        for sign in (1, -1):
            z = grouped.copy()
            z[k] += sign * step
            full = np.tile(z, layout[0]) if tie_variance == "band" else z
            model.sigma_ = np.exp(full / 2).astype(np.float32)
            values.append(mean_free_energy())
        fd[k] = (values[0] - values[1]) / (2 * step)
    assert analytic["log_variance"].shape == grouped.shape
    np.testing.assert_allclose(analytic["log_variance"], fd, rtol=2e-3, atol=3e-4)


# --------------------------------------------------------------------------------------
# 3. stepped sigmoid units and noisy rectified units
# --------------------------------------------------------------------------------------


def identity_model(n, *, hidden, n_copies=10):
    """x = v exactly: W = I, c = 0, b = 0, σ = 1."""
    model = RBM(n_hidden=n, hidden=hidden, n_copies=n_copies, tie_variance="unit", seed=0)
    model.initialize(n)
    model.weights_ = np.eye(n, dtype=np.float32)
    model.visible_bias_ = np.zeros(n, np.float32)
    model.hidden_bias_ = np.zeros(n, np.float32)
    model.sigma_ = np.ones(n, np.float32)
    return model


_STEPPED = identity_model(1, hidden="stepped", n_copies=60)


@settings(max_examples=60, deadline=None)
@given(st.floats(min_value=-8.0, max_value=25.0, allow_nan=False))
def test_stepped_mean_approximates_softplus(x):
    # Source: Nair & Hinton 2010, Σₙ sigmoid(x − n + 0.5) ≈ log(1 + eˣ).  The sum is the
    # midpoint rule for ∫₀^∞ sigmoid(x − t) dt = softplus(x); Euler–Maclaurin for the
    # midpoint rule gives the error −sigmoid'(x)/24 + O(sigmoid'''/5760), so the
    # approximation is within 1/96 + 1e-3 everywhere, and within 1e-3 after the
    # first correction.  60 copies make the truncation at n = 60 negligible for x ≤ 25.
    got = float(_STEPPED.transform([[x]])[0, 0])
    softplus = float(np.logaddexp(0.0, x))
    slope = float(scipy.special.expit(x) * scipy.special.expit(-x))
    assert abs(got - softplus) <= 1 / 96 + 1e-3
    assert got == pytest.approx(softplus - slope / 24, abs=1e-3)


def test_rectified_free_energy_is_the_infinite_stepped_sum(rng):
    # Source: Nair & Hinton 2010, the rectified unit's free energy is the stepped one with
    # infinitely many copies; reference: 400 copies summed in float64.
    model = random_model(rng, n_visible=4, n_hidden=6, hidden="relu", scale=3.0)
    weights, b, c, var = float64_params(model)
    v = rng.normal(0.0, 3.0, (20, 4))
    x = c + (v / var) @ weights
    assert x.max() > 20  # exercises the closed-form part of the sum
    copies = np.arange(1, 401) - 0.5
    log_partial = np.logaddexp(0.0, x[..., None] - copies).sum(axis=(1, 2))
    expected = ((v - b) ** 2 / (2 * var)).sum(1) - log_partial
    np.testing.assert_allclose(model.free_energy(v), expected, rtol=2e-6, atol=1e-4)


@pytest.mark.parametrize("x", [4.0, 6.0])
def test_rectified_noise_variance_is_sigmoid(x):
    # Source: Nair & Hinton 2010, max(0, x + N(0, sigmoid(x))).  Far above zero the
    # clipping is negligible (P(x + ε < 0) < 3e-5), so the sample variance is sigmoid(x);
    # 4e5 draws give a standard error of √(2/n)·σ² ≈ 2.2e-3.
    model = identity_model(1, hidden="relu")
    samples = model.sample_hidden(np.full((400_000, 1), x, np.float32), rng=5)[:, 0]
    assert samples.var() == pytest.approx(scipy.special.expit(x), abs=5 * 2.3e-3)
    assert samples.mean() == pytest.approx(x, abs=5 * np.sqrt(1 / 4e5))


@pytest.mark.parametrize("x", [-1.0, 0.0, 0.5, 1.0, 2.0])
def test_rectified_sample_moments_are_censored_normal(x):
    # Source: moments of a normal variable censored at zero, Y = max(0, Z),
    # Z ~ N(x, s²), s² = sigmoid(x): E[Y] = xΦ(x/s) + sφ(x/s),
    # E[Y²] = (x² + s²)Φ(x/s) + xsφ(x/s) (standard; Φ, φ from scipy.stats.norm).
    model = identity_model(1, hidden="relu")
    n = 400_000
    samples = model.sample_hidden(np.full((n, 1), x, np.float32), rng=6)[:, 0].astype(float)
    s = np.sqrt(scipy.special.expit(x))
    a = x / s
    mean = x * scipy.stats.norm.cdf(a) + s * scipy.stats.norm.pdf(a)
    second = (x**2 + s**2) * scipy.stats.norm.cdf(a) + x * s * scipy.stats.norm.pdf(a)
    var = second - mean**2
    assert samples.mean() == pytest.approx(mean, abs=5 * np.sqrt(var / n))
    # standard error of a sample variance: √((μ₄ − σ⁴)/n), μ₄ estimated from the draws
    fourth = ((samples - samples.mean()) ** 4).mean()
    assert samples.var() == pytest.approx(var, abs=5 * np.sqrt((fourth - var**2) / n))
    assert samples.min() == 0.0


@pytest.mark.parametrize("hidden", ["stepped", "binary"])
def test_binary_and_stepped_samples_are_bernoulli_sums(hidden):
    # Source: a sum of independent Bernoulli(pₙ) draws has mean Σpₙ, variance Σpₙ(1 − pₙ).
    model = identity_model(3, hidden=hidden, n_copies=5)
    x = np.array([-1.0, 0.7, 3.0], np.float32)
    n = 200_000
    samples = model.sample_hidden(np.tile(x, (n, 1)), rng=7).astype(float)
    n_copies = 5 if hidden == "stepped" else 1
    offsets = (np.arange(1, n_copies + 1) - 0.5) if hidden == "stepped" else np.array([0.0])
    p = scipy.special.expit(x[:, None] - offsets)
    np.testing.assert_allclose(samples.mean(0), p.sum(1), atol=5 * np.sqrt(n_copies / 4 / n))
    np.testing.assert_allclose(samples.var(0), (p * (1 - p)).sum(1), rtol=0.02)
    assert np.array_equal(samples, np.round(samples)) and samples.max() <= n_copies


def test_visible_noise_isstandard_normal(rng):
    # Source: scipy.stats.kstest against the normal distribution; the model draws its
    # Gaussian noise with the Box–Muller transform (Box & Muller 1958).
    model = random_model(rng, n_visible=5, n_hidden=2)
    hidden = np.zeros((40_001, 2), np.float32)  # odd size: exercises the last draw
    samples = model.sample_visible(hidden, rng=8)
    standardised = (samples - model.visible_bias_) / model.sigma_
    for column in standardised.T:
        assert scipy.stats.kstest(column, "norm").pvalue > 1e-3
    assert abs(scipy.stats.kurtosis(standardised.ravel())) < 0.05


# --------------------------------------------------------------------------------------
# 4. scale equivariance of rectified units
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("factor", [0.5, 2.0, 4.0, 3.7])
def test_relu_transform_is_scale_equivariant(rng, factor):
    # Source: Nair & Hinton 2010 (common practice): max(0, a·u) = a·max(0, u) for a > 0.
    # transform(v) = max(0, c + Wᵀ(v/σ²)) is linear in v inside the max only when c = 0;
    # σ is a fixed parameter here (it is not refitted to a·v) and b does not enter.
    # Powers of two scale exactly in floating point, so those are compared bit for bit.
    model = random_model(rng, n_visible=6, n_hidden=9, hidden="relu")
    model.hidden_bias_[:] = 0.0
    v = rng.normal(0.0, 1.0, (50, 6)).astype(np.float32)
    scaled = (factor * v).astype(np.float32)
    if factor in (0.5, 2.0, 4.0):
        np.testing.assert_array_equal(model.transform(scaled), factor * model.transform(v))
    else:
        np.testing.assert_allclose(model.transform(scaled), factor * model.transform(v),
                                   rtol=1e-5, atol=1e-6)
    # the mean-field reconstruction b + W·h also needs b = 0
    model.visible_bias_[:] = 0.0
    np.testing.assert_allclose(model.mean_visible(model.transform(scaled)),
                               factor * model.mean_visible(model.transform(v)),
                               rtol=1e-5, atol=1e-6)


def test_relu_scale_equivariance_needs_zero_hidden_bias(rng):
    # The condition stated above matters: with c ≠ 0 the property fails.
    model = random_model(rng, n_visible=6, n_hidden=9, hidden="relu")
    model.hidden_bias_[:] = 0.7
    v = rng.normal(0.0, 1.0, (50, 6)).astype(np.float32)
    assert not np.allclose(model.transform(2 * v), 2 * model.transform(v), atol=1e-3)


# --------------------------------------------------------------------------------------
# 5. scikit-learn's BernoulliRBM as reference
# --------------------------------------------------------------------------------------


def test_matches_sklearn_bernoulli_rbm(rng):
    # Source: sklearn.neural_network.BernoulliRBM with our parameters copied in.
    from sklearn.neural_network import BernoulliRBM

    model = random_model(rng, n_visible=12, n_hidden=7, visible="binary", scale=1.0)
    reference = BernoulliRBM(n_components=7)
    reference.components_ = model.weights_.T.astype(np.float64)
    reference.intercept_hidden_ = model.hidden_bias_.astype(np.float64)
    reference.intercept_visible_ = model.visible_bias_.astype(np.float64)
    reference.n_features_in_ = 12
    v = (rng.random((64, 12)) < 0.4).astype(np.float64)
    np.testing.assert_allclose(model.free_energy(v), reference._free_energy(v),
                               rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(model.transform(v), reference.transform(v), rtol=1e-5,
                               atol=1e-5)


# --------------------------------------------------------------------------------------
# 6. learning the variances
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("tie_variance", ["unit", "band"])
def test_learns_the_standard_deviations_of_a_gaussian_mixture(tie_variance):
    # Data: two equally likely Gaussian components, means ∓3σᵢ (so centred, as the
    # pipeline's standardisation leaves them) and a shared per-dimension σᵢ.  A
    # Gaussian-visible RBM with binary hiddens is exactly a mixture of 2^H Gaussians with
    # shared diagonal covariance σ² (Cho, Ilin & Raiko 2011), so it can represent the
    # truth with one hidden unit.  Check: learned σ within 20% of the truth from σ = 1.
    rng = np.random.default_rng(11)
    if tie_variance == "band":
        layout = (2, 3)
        truth = np.tile([0.3, 0.6, 1.6], 2).astype(np.float32)
    else:
        layout = None
        truth = np.array([0.3, 0.6, 1.0, 1.5, 0.45, 2.0], np.float32)
    component = (rng.random((4000, 1)) < 0.5).astype(np.float32)
    data = (component - 0.5) * (6 * truth) + rng.standard_normal((4000, 6)) * truth
    model = RBM(n_hidden=2, hidden="binary", tie_variance=tie_variance, layout=layout,
                learning_rate=0.02, variance_learning_rate=0.02, weight_decay=0.0,
                learning_rate_decay=0.0, epochs=40, batch_size=100, seed=0)
    model.fit(data.astype(np.float32))
    np.testing.assert_allclose(model.sigma_, truth, rtol=0.2)
    if tie_variance == "band":
        assert np.array_equal(model.sigma_[:3], model.sigma_[3:])


# --------------------------------------------------------------------------------------
# 7. divergence guard
# --------------------------------------------------------------------------------------


def structured_data(rng, n=1024, d=12):
    factors = rng.standard_normal((n, 3)) @ rng.standard_normal((3, d))
    data = factors + 0.1 * rng.standard_normal((n, d))
    return ((data - data.mean(0)) / data.std(0)).astype(np.float32)


def batches_of(data, size=64):
    return lambda: (data[i:i + size] for i in range(0, len(data), size))


@pytest.mark.parametrize(("hidden", "reason"), [("relu", "non-finite"), ("binary", "jumped")])
def test_divergence_is_rolled_back_and_retried(rng, hidden, reason):
    # Learning rates far above what these units tolerate (Hinton 2010 suggests ~1e-3 for
    # Gaussian visibles): relu overflows to inf, binary hiddens blow up finitely.
    data = structured_data(rng)
    # The step limit is off (0): this checks the guard alone (the limit is tested below).
    settings_ = dict(n_hidden=8, hidden=hidden, learn_variance=False, seed=0, max_rollbacks=20,
                     learning_rate=1.0 if hidden == "binary" else 30.0, max_step=0)
    model = RBM(**settings_).initialize(12, visible_mean=data.mean(0))
    state = model.get_state()  # the good state before the epoch
    with pytest.warns(DivergenceWarning, match="rolled back"):
        stats = model.fit_epoch(batches_of(data), epoch=0)
    assert stats["rollbacks"] >= 1
    assert any(reason in r for r in stats["rollback_reasons"])
    assert stats["learning_rate_scale"] == 0.5 ** stats["rollbacks"]
    assert model.learning_rate_scale_ == stats["learning_rate_scale"]
    assert model.history_[-1] == stats
    assert np.isfinite(model.weights_).all() and np.isfinite(model.sigma_).all()

    # the surviving attempt started from the good state: it equals a run from that state
    # at the reduced rate with no rollback (the generator is restored on rollback too)
    replay = RBM(**settings_).set_state(state)
    replay.learning_rate_scale_ = stats["learning_rate_scale"]
    with warnings.catch_warnings():
        warnings.simplefilter("error", DivergenceWarning)
        replay_stats = replay.fit_epoch(batches_of(data), epoch=0)
    assert replay_stats["rollbacks"] == 0
    np.testing.assert_array_equal(model.weights_, replay.weights_)
    np.testing.assert_array_equal(model.hidden_bias_, replay.hidden_bias_)


@pytest.mark.parametrize("hidden", ["relu", "binary", "stepped"])
def test_step_limit_keeps_a_runaway_learning_rate_finite(rng, hidden):
    # The same runaway rate as above, with the default step limit (gradient-norm
    # clipping, Pascanu, Mikolov & Bengio 2013): every step is at most max_step of the
    # weights' norm, so training stays finite without a rollback, and says how often
    # it limited a step.
    data = structured_data(rng)
    model = RBM(n_hidden=8, hidden=hidden, seed=0, learning_rate=30.0, max_rollbacks=0)
    model.initialize(12, visible_mean=data.mean(0))
    norms = [float(np.linalg.norm(model.weights_))]
    for epoch in range(3):
        with warnings.catch_warnings():
            warnings.simplefilter("error", DivergenceWarning)
            stats = model.fit_epoch(batches_of(data), epoch=epoch)
        assert stats["rollbacks"] == 0
        assert stats["limited_steps"] >= 1
        norms.append(float(np.linalg.norm(model.weights_)))
    assert np.isfinite(model.weights_).all() and np.isfinite(model.sigma_).all()
    # each epoch has 16 minibatches; with momentum 0.5 a step is at most 2 x 5 % of the norm
    growth = np.array(norms[1:]) / np.array(norms[:-1])
    assert (growth <= (1 + 2 * model.max_step) ** 16).all()


@pytest.mark.parametrize("max_step", [-0.1, float("nan"), float("inf"), "big"])
def test_step_limit_must_be_a_finite_share(max_step):
    with pytest.raises(ParameterError, match="max_step"):
        RBM(max_step=max_step).initialize(4)


def test_repeated_divergence_raises_and_keeps_the_good_state(rng):
    data = structured_data(rng)
    model = RBM(n_hidden=8, learning_rate=1e-3, seed=0, max_rollbacks=3).fit(data[:256])
    before = model.get_state()
    model.set_params(learning_rate=1e4, variance_learning_rate=1e3, max_step=0)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with pytest.raises(DivergenceError, match="diverged in epoch"):
            model.fit_epoch(batches_of(data), epoch=model.n_epochs_)
    assert sum(issubclass(w.category, DivergenceWarning) for w in caught) == 3
    for name in ("weights", "visible_bias", "hidden_bias", "log_variance",
                 "velocity_weights"):
        np.testing.assert_array_equal(model.get_state()[name], before[name])
    assert model.get_state()["rng"] == before["rng"]
    assert model.n_epochs_ == before["epoch"] and len(model.history_) == len(before["history"])


def test_fit_epoch_restores_the_snapshot_on_bad_input(rng):
    data = structured_data(rng)
    model = RBM(n_hidden=8, seed=0).fit(data[:256])
    before = model.weights_.copy()
    bad = data[:128].copy()
    bad[5, 3] = np.nan

    def make_batches():
        yield data[:64]
        yield bad

    with pytest.raises(ParameterError, match="minibatch 1 holds 1 NaN"):
        model.fit_epoch(make_batches, epoch=model.n_epochs_)
    np.testing.assert_array_equal(model.weights_, before)


def test_level_shift_is_not_taken_for_divergence(rng):
    # New data that are harder from the first minibatch on (before any update) are not
    # a divergence: the reference is at least the first minibatch's error.
    data = structured_data(rng)
    model = RBM(n_hidden=8, learning_rate=1e-2, seed=0, epochs=5).fit(data)
    previous = model.history_[-1]["relative_error"]
    shifted = data + 5.0
    with warnings.catch_warnings():
        warnings.simplefilter("error", DivergenceWarning)
        stats = model.fit_epoch(batches_of(shifted), epoch=model.n_epochs_)
    assert stats["rollbacks"] == 0
    # a reference of the previous epoch alone would have flagged this epoch
    assert stats["relative_error"] > max(1.0, model.divergence_factor * previous)


def test_fit_epoch_reports_its_figures(rng):
    data = structured_data(rng)
    model = RBM(n_hidden=16, seed=0, layout=(3, 4))
    stats = model.fit_epoch(batches_of(data), epoch=0)  # initialises lazily
    for key in ("epoch", "recon_error", "mean_hidden_activity", "dead_fraction",
                "sigma_min", "sigma_max", "rollbacks", "learning_rate_scale"):
        assert key in stats
    assert stats["n_rows"] == len(data) and model.n_epochs_ == 1
    assert 0.0 <= stats["dead_fraction"] <= 1.0
    assert stats["sigma_min"] <= stats["sigma_max"]
    json.dumps(stats)  # JSON-able for the trainer's logs


# --------------------------------------------------------------------------------------
# 8. estimator contract
# --------------------------------------------------------------------------------------


def test_init_only_stores_parameters():
    model = RBM(n_hidden=3, hidden="nonsense", seed=4)
    assert model.hidden == "nonsense"  # validated at fit time, not in __init__
    assert not [k for k in vars(model) if k.endswith("_") or k.startswith("_")]
    with pytest.raises(ParameterError, match="hidden must be one of"):
        model.fit(np.zeros((4, 2)))


def test_get_set_params_clone_and_pipeline(rng):
    # Source: scikit-learn's clone and Pipeline as the reference estimator protocol.
    from sklearn.base import clone
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler

    model = RBM(n_hidden=5, layout=(2, 3), epochs=2, seed=1)
    twin = clone(model)
    assert twin is not model and twin.get_params() == model.get_params()
    assert model.set_params(n_hidden=7) is model and model.n_hidden == 7
    with pytest.raises(ParameterError, match="unknown RBM parameter 'n_hiden'"):
        model.set_params(n_hiden=3)

    data = rng.normal(5.0, 3.0, (300, 6))
    pipe = Pipeline([("scale", StandardScaler()), ("rbm", RBM(n_hidden=5, epochs=2, seed=1))])
    features = pipe.fit_transform(data)
    assert features.shape == (300, 5) and features.dtype == np.float32
    np.testing.assert_array_equal(pipe.transform(data), features)
    refit = clone(pipe).fit(data)
    np.testing.assert_array_equal(refit.transform(data), features)


def test_same_seed_same_result(rng):
    data = structured_data(rng, n=300)
    first = RBM(n_hidden=6, epochs=3, seed=9).fit(data)
    second = RBM(n_hidden=6, epochs=3, seed=9).fit(data)
    np.testing.assert_array_equal(first.weights_, second.weights_)
    np.testing.assert_array_equal(first.sigma_, second.sigma_)
    third = RBM(n_hidden=6, epochs=3, seed=10).fit(data)
    assert not np.array_equal(first.weights_, third.weights_)


@pytest.mark.parametrize("options", [
    {},
    {"persistent": True, "hidden": "binary"},
    {"hidden": "stepped", "n_copies": 3, "sparsity_target": 0.2, "n_steps": 2},
])
def test_resumed_run_equals_uninterrupted_run(rng, options):
    data = structured_data(rng, n=300)
    settings_ = dict(n_hidden=6, batch_size=32, seed=5, layout=(3, 4),
                     momentum_switch_epoch=2, **options)
    whole = RBM(epochs=4, **settings_).fit(data)
    first_half = RBM(epochs=2, **settings_).fit(data)
    state = first_half.get_state()
    # a checkpoint goes through np.savez (arrays) and JSON (the rest)
    arrays = {k: v for k, v in state.items() if isinstance(v, np.ndarray)}
    rest = json.loads(json.dumps({k: v for k, v in state.items() if k not in arrays}))
    resumed = RBM(epochs=2, warm_start=True, **settings_).set_state({**arrays, **rest})
    resumed.fit(data)
    np.testing.assert_array_equal(resumed.weights_, whole.weights_)
    np.testing.assert_array_equal(resumed.visible_bias_, whole.visible_bias_)
    np.testing.assert_array_equal(resumed.hidden_bias_, whole.hidden_bias_)
    np.testing.assert_array_equal(resumed.sigma_, whole.sigma_)
    assert resumed.n_epochs_ == whole.n_epochs_ == 4
    strip = [{k: v for k, v in h.items() if k != "seconds"} for h in whole.history_]
    assert [{k: v for k, v in h.items() if k != "seconds"} for h in resumed.history_] == strip


def test_partial_fit_is_one_pass_in_order(rng):
    data = structured_data(rng, n=200)
    model = RBM(n_hidden=4, batch_size=50, seed=2)
    model.partial_fit(data).partial_fit(data)
    assert model.n_epochs_ == 2 and [h["n_rows"] for h in model.history_] == [200, 200]
    manual = RBM(n_hidden=4, batch_size=50, seed=2)
    manual.initialize(data.shape[1], visible_mean=data.mean(0, dtype=np.float64))
    for epoch in range(2):
        manual.fit_epoch(batches_of(data, 50), epoch=epoch)
    np.testing.assert_array_equal(model.weights_, manual.weights_)


@pytest.mark.parametrize("method", ["transform", "free_energy", "reconstruction_error",
                                    "sample_hidden", "gibbs", "cd_gradient", "save"])
def test_unfitted_model_refuses(method, tmp_path):
    model = RBM(n_hidden=3)
    args = (tmp_path / "m.npz",) if method == "save" else (np.zeros((2, 4)),)
    with pytest.raises(NotFittedError, match="not fitted"):
        getattr(model, method)(*args)


@pytest.mark.parametrize("method", ["transform", "free_energy", "partial_fit",
                                    "reconstruction_error", "sample_hidden"])
def test_wrong_column_count_refused(rng, method):
    model = RBM(n_hidden=3, epochs=1, seed=0).fit(rng.normal(size=(40, 5)))
    with pytest.raises(ParameterError, match="X has 4 columns but the model has 5"):
        getattr(model, method)(rng.normal(size=(10, 4)))


@pytest.mark.parametrize(("bad", "message"), [
    (np.array([1.0, 2.0]), "must be 2-D"),
    (np.array([[1.0, np.nan]]), "NaN or infinite"),
    (np.array([[1e39, 0.0]]), "NaN or infinite"),
    ([["a", "b"]], "convertible to float32"),
    (np.array([[1 + 1j, 0]]), "real-valued"),
    (np.zeros((0, 2)), "at least one row"),
])
def test_invalid_input_refused(bad, message):
    with pytest.raises(ParameterError, match=message):
        RBM(n_hidden=2).fit(bad)


@pytest.mark.parametrize(("name", "value"), [
    ("n_hidden", 0), ("n_hidden", 2.5), ("visible", "poisson"), ("tie_variance", "all"),
    ("layout", (2, 0)), ("n_steps", 0), ("learning_rate", 0.0), ("final_momentum", 1.0),
    ("sigma_floor", -1.0), ("sigma_ceiling", 0.01), ("batch_size", True),
    ("divergence_factor", 1.0), ("seed", -3), ("persistent", "yes"),
])
def test_invalid_hyperparameters_refused(name, value):
    with pytest.raises(ParameterError, match=name):
        RBM(**{name: value}).fit(np.zeros((4, 6)))


def test_layout_must_match_width():
    with pytest.raises(ParameterError, match=r"layout \(2, 2\) describes 4 visible units"):
        RBM(layout=(2, 2)).fit(np.zeros((4, 6)))


def test_float32_out_and_input_untouched(rng):
    data = rng.normal(size=(100, 6))
    copy = data.copy()
    model = RBM(n_hidden=4, epochs=2, seed=0).fit(data)
    outputs = [model.transform(data), model.free_energy(data), model.sample_hidden(data),
               model.gibbs(data, steps=2), model.mean_visible(model.transform(data))]
    assert all(o.dtype == np.float32 for o in outputs)
    assert outputs[0].shape == (100, 4) and outputs[1].shape == (100,)
    assert model.weights_.dtype == np.float32 and model.sigma_.dtype == np.float32
    np.testing.assert_array_equal(data, copy)
    assert isinstance(model.reconstruction_error(data), float)
    with pytest.raises(ValueError, match="read-only"):
        model.sigma_[0] = 3.0


def test_binary_visibles_keep_unit_sigma(rng):
    data = (rng.random((200, 8)) < 0.3).astype(np.float32)
    model = RBM(n_hidden=4, visible="binary", hidden="binary", learning_rate=0.05,
                epochs=3, seed=0).fit(data)
    np.testing.assert_array_equal(model.sigma_, np.ones(8, np.float32))
    assert set(np.unique(model.gibbs(data[:20]))) <= {0.0, 1.0}


# ---------------------------------------------------------------- model files


@pytest.fixture
def saved(tmp_path, rng):
    model = RBM(n_hidden=5, layout=(2, 3), epochs=2, seed=3).fit(rng.normal(size=(120, 6)))
    path = tmp_path / "model.npz"
    model.save(path, metadata={"front_end": {"n_mels": 3}, "note": "ünïcode"},
               arrays={"band_mean": np.arange(3.0), "band_std": np.ones(3, np.float32)})
    return model, path


def test_save_load_round_trip(saved, rng):
    model, path = saved
    loaded = RBM.load(path)
    for name in ("weights_", "visible_bias_", "hidden_bias_", "sigma_"):
        np.testing.assert_array_equal(getattr(loaded, name), getattr(model, name))
    assert loaded.get_params() == model.get_params()
    assert loaded.metadata_ == {"front_end": {"n_mels": 3}, "note": "ünïcode"}
    assert loaded.history_ == json.loads(json.dumps(model.history_))
    data = rng.normal(size=(7, 6)).astype(np.float32)
    np.testing.assert_array_equal(loaded.transform(data), model.transform(data))
    contents = read_model_file(path)
    assert isinstance(contents, ModelFile) and contents.rbm.n_features_in_ == 6
    np.testing.assert_array_equal(contents.arrays["band_mean"], np.arange(3.0))
    assert len(contents.checksum) == 64
    assert sorted(os.listdir(path.parent)) == ["model.npz"]  # no temporary left behind
    loaded.set_params(warm_start=True, epochs=1).fit(data)  # a loaded model trains on


def test_save_refuses_bad_extras(saved, tmp_path):
    model, _ = saved
    with pytest.raises(ParameterError, match="JSON"):
        model.save(tmp_path / "x.npz", metadata={"f": object()})
    with pytest.raises(ParameterError, match="must be numeric"):
        model.save(tmp_path / "x.npz", arrays={"names": np.array(["a"], dtype=object)})
    with pytest.raises(ParameterError, match="must match"):
        model.save(tmp_path / "x.npz", arrays={"bad name": np.zeros(2)})
    assert sorted(os.listdir(tmp_path)) == ["model.npz"]


def rewrite(path, change):
    """Rewrite an npz with change(dict of arrays) applied (a valid zip, stale checksum)."""
    with np.load(path, allow_pickle=False) as archive:
        contents = {k: archive[k] for k in archive.files}
    change(contents)
    with open(path, "wb") as stream:
        np.savez(stream, **contents)


def set_header(contents, **updates):
    header = json.loads(contents["header"].tobytes().decode())
    header.update(updates)
    contents["header"] = np.frombuffer(json.dumps(header).encode(), dtype=np.uint8)


def damage_truncate(path):
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def damage_flip_bit(path):
    data = bytearray(path.read_bytes())
    with zipfile.ZipFile(path) as archive:
        info = archive.getinfo("param.weights.npy")
    data[info.header_offset + 200] ^= 0x10  # inside the weights' bytes
    path.write_bytes(bytes(data))


def damage_tamper(path):
    def change(c):
        c["param.weights"] = c["param.weights"] * np.float32(1.01)
    rewrite(path, change)


def damage_newer(path):
    rewrite(path, lambda c: set_header(c, format_version=FORMAT_VERSION + 1))


def damage_nan(path):
    def change(c):
        c["param.sigma"] = c["param.sigma"].copy()
        c["param.sigma"][1] = np.nan
    rewrite(path, change)


def damage_pickle(path):
    def change(c):
        c["user.band_mean"] = np.array([{"evil": 1}], dtype=object)
    rewrite(path, change)


def damage_missing(path):
    rewrite(path, lambda c: c.pop("param.hidden_bias"))


def damage_unlisted(path):
    rewrite(path, lambda c: c.update({"user.extra": np.zeros(2)}))


def damage_not_zip(path):
    path.write_text("weights = [1, 2, 3]\n")


def damage_foreign(path):
    rewrite(path, lambda c: set_header(c, format="something-else"))


def damage_header_json(path):
    rewrite(path, lambda c: c.update({"header": np.frombuffer(b"{not json", np.uint8)}))


@pytest.mark.parametrize(("damage", "reason"), [
    (damage_truncate, "truncated"),
    (damage_flip_bit, "damaged"),
    (damage_tamper, "checksum mismatch"),
    (damage_newer, "newer than this timbrel reads"),
    (damage_nan, "NaN or infinite"),
    (damage_pickle, "pickled object array"),
    (damage_missing, "missing array"),
    (damage_unlisted, "not listed in its header"),
    (damage_not_zip, "not an .npz"),
    (damage_foreign, "is not 'timbrel-rbm'"),
    (damage_header_json, "not UTF-8 JSON"),
])
def test_damaged_model_files_refused(saved, damage, reason):
    _, path = saved
    damage(path)
    with pytest.raises(ModelFileError, match=reason) as info:
        RBM.load(path)
    assert str(path) in str(info.value)


def test_missing_model_file_refused(tmp_path):
    with pytest.raises(ModelFileError, match="no such model file"):
        read_model_file(tmp_path / "absent.npz")
