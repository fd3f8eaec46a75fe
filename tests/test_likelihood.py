# ruff: noqa: RUF003  (docstrings and messages use math notation: σ, −, β, ×)
"""Tests of timbrel.likelihood: log Z by AIS and by enumeration, and the score command.

Outside references, named beside each check:
- enumeration of hidden states (the model's exact log Z) against numerical integration of
  exp(−E) written out from the energy's definition, by ``scipy.integrate`` (nquad, quad);
- the closed form of a model with no weights (a product of independent Gaussians and
  independent hidden units: textbook Gaussian integral, softplus partition sums);
- the stepped-sigmoid partition sum against K calls of ``numpy.logaddexp``.
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
import soundfile as sf
from scipy import integrate
from typer.testing import CliRunner

from timbrel import ParameterError
from timbrel.cache import FrameCache
from timbrel.cli import app
from timbrel.frontend import stack_context
from timbrel.likelihood import (
    EXACT_MAX_HIDDEN,
    _annealing_path,
    ais_log_partition,
    log_partition,
    relu_partition_bound,
    score,
    temperature_schedule,
)
from timbrel.model import RBM
from timbrel.pipeline import load_pipeline
from timbrel.windows import split_clips

runner = CliRunner()


def _tiny(n_visible, n_hidden, *, weight_scale, seed, hidden="binary", visible="gaussian",
          n_copies=10):
    """A fitted-state RBM with random, non-trivial parameters (no training)."""
    rng = np.random.default_rng(seed)
    rbm = RBM(n_hidden=n_hidden, hidden=hidden, visible=visible, n_copies=n_copies,
              seed=seed).initialize(n_visible)
    rbm.weights_ = (weight_scale * rng.standard_normal((n_visible, n_hidden))).astype(np.float32)
    rbm.visible_bias_ = rng.normal(0.0, 0.5, n_visible).astype(np.float32)
    rbm.hidden_bias_ = rng.normal(-1.0, 0.5, n_hidden).astype(np.float32)
    if visible == "gaussian":
        rbm.sigma_ = rng.uniform(0.6, 1.2, n_visible).astype(np.float32)
    return rbm


def _model_moments(rbm):
    """Mean and variance of v under a Gaussian-binary model, hidden states enumerated.

    p(h) ∝ exp(c·h + Σᵢ ((bᵢ + (Wh)ᵢ)² − bᵢ²)/(2σᵢ²)) and v | h ~ N(b + Wh, σ²): the moments a
    base rate gets from data the model describes well.
    """
    w = rbm.weights_.astype(np.float64)
    b, c = rbm.visible_bias_.astype(np.float64), rbm.hidden_bias_.astype(np.float64)
    var = rbm.sigma_.astype(np.float64) ** 2
    states = np.array(list(itertools.product([0.0, 1.0], repeat=rbm.n_hidden)))
    means = b + states @ w.T
    log_p = states @ c + ((means**2 - b**2) / (2 * var)).sum(axis=1)
    p = np.exp(log_p - log_p.max())
    p /= p.sum()
    mean = p @ means
    return mean, var + p @ (means - mean) ** 2


def _phi(x, hidden, n_copies):
    """log Σ_h e^{x h} of one hidden unit: softplus, or its sum over stepped copies."""
    if hidden == "binary":
        return float(np.logaddexp(0.0, x))
    return float(sum(np.logaddexp(0.0, x - k + 0.5) for k in range(1, n_copies + 1)))


# ------------------------------------------------------------------ building blocks


def test_schedule_runs_from_zero_to_one_and_is_denser_near_the_model():
    betas = temperature_schedule(1500)
    assert betas.shape == (1501,) and betas[0] == 0.0 and betas[-1] == 1.0
    assert np.all(np.diff(betas) > 0)
    # the shape of Salakhutdinov & Murray's schedule (from memory): 1/15 of the steps to 0.5,
    # 5/15 to 0.9
    assert betas[100] == pytest.approx(0.5) and betas[500] == pytest.approx(0.9)
    with pytest.raises(ParameterError):
        temperature_schedule(0)


# ------------------------------------------------------------------ outside reference: scipy


def _energy_integrand(rbm):
    """Σ_h exp(−E(v, h)) from the energy as written in model.py, hidden states enumerated."""
    w = rbm.weights_.astype(np.float64)
    b = rbm.visible_bias_.astype(np.float64)
    c = rbm.hidden_bias_.astype(np.float64)
    var = rbm.sigma_.astype(np.float64) ** 2
    states = np.array(list(itertools.product([0.0, 1.0], repeat=rbm.n_hidden)))

    def integrand(*v):
        v = np.array(v)
        energy = (np.sum((v - b) ** 2 / (2 * var)) - states @ c - states @ (w.T @ (v / var)))
        return float(np.exp(-energy).sum())

    return integrand


@pytest.mark.parametrize(("n_visible", "n_hidden", "seed"), [(1, 3, 0), (2, 3, 1), (2, 4, 2)])
def test_exact_log_z_matches_scipy_nquad(n_visible, n_hidden, seed):
    # reference: scipy.integrate.nquad of Σ_h exp(−E(v, h)) over v (Gaussian visibles)
    rbm = _tiny(n_visible, n_hidden, weight_scale=0.8, seed=seed)
    b, sigma = rbm.visible_bias_.astype(float), rbm.sigma_.astype(float)
    reach = np.abs(rbm.weights_).sum(axis=1)  # the largest top-down shift of each visible
    ranges = [(b[i] - reach[i] - 12 * sigma[i], b[i] + reach[i] + 12 * sigma[i])
              for i in range(n_visible)]
    value, error = integrate.nquad(_energy_integrand(rbm), ranges, opts={"epsabs": 0,
                                                                         "epsrel": 1e-10})
    assert error < 1e-7 * value
    assert rbm.exact_log_partition() == pytest.approx(math.log(value), abs=1e-6)
    # and AIS reaches the same figure
    estimate = ais_log_partition(rbm, visible_mean=np.zeros(n_visible),
                                 visible_var=np.ones(n_visible), n_chains=100,
                                 n_temperatures=500, seed=seed)
    assert abs(estimate.log_z - math.log(value)) < 0.1


@pytest.mark.parametrize(("hidden", "copies"), [("stepped", None), ("relu", 30)])
def test_ais_for_stepped_and_rectified_units_matches_scipy_quad(hidden, copies):
    # reference: scipy.integrate.quad of exp(−F(v)) over one visible, with F written out
    # from the stepped free energy; rectified units are annealed in that stepped form (the
    # relu model is one whose infinite-copy Z is finite, so 30 copies reach its regime)
    rbm = _tiny(1, 5, weight_scale=1.0, seed=7, hidden=hidden, n_copies=6)
    if hidden == "relu":
        # active units (biases 2–3.5) whose weights stay inside the finite-Z region:
        # Σ of squared positive (negative) weights/σ below 1
        rbm.weights_ = np.array([[0.6, 0.5, -0.6, 0.4, -0.5]], np.float32)
        rbm.hidden_bias_ = np.array([3.0, 2.5, 3.5, 2.0, 3.0], np.float32)
        rbm.sigma_ = np.array([1.0], np.float32)
    n_copies = copies or rbm.n_copies
    w = rbm.weights_.astype(float)[0]
    b, c = float(rbm.visible_bias_[0]), rbm.hidden_bias_.astype(float)
    var = float(rbm.sigma_[0]) ** 2

    def density(v):
        x = c + w * v / var
        return math.exp(-(v - b) ** 2 / (2 * var) + sum(_phi(xj, "stepped", n_copies)
                                                       for xj in x))

    value, error = integrate.quad(density, -60, 60, epsabs=0, epsrel=1e-11, limit=400)
    assert error < 1e-8 * value
    # the base rate from "data" drawn from the model itself: its mean and variance by quad
    # (the density's mass sits near v = −10, far from a unit Gaussian at 0)
    mean = integrate.quad(lambda v: v * density(v), -60, 60, limit=400)[0] / value
    second = integrate.quad(lambda v: v * v * density(v), -60, 60, limit=400)[0] / value
    estimate = ais_log_partition(rbm, visible_mean=[mean], visible_var=[second - mean**2],
                                 copies=copies, n_chains=400, n_temperatures=3000, seed=3)
    print(f"{hidden}: AIS {estimate.log_z:.4f} ± {estimate.log_z_std:.4f}, scipy.quad "
          f"{math.log(value):.4f}, base {estimate.log_z_base:.4f}")
    assert abs(estimate.log_z - math.log(value)) < 0.1
    assert abs(estimate.log_z_base - math.log(value)) > 1.0  # the path had work to do
    if hidden == "relu":
        # in one dimension the finite-Z condition is exact: positive and negative weights'
        # squares each sum below 1 (0.77 and 0.61); the general bound must not call it
        # infinite (its spectral test, 1.17 here, cannot decide)
        bound = relu_partition_bound(rbm)
        assert bound["finite"] is None and bound["largest_q"] == pytest.approx(0.77, abs=1e-6)


# ------------------------------------------------------------------ AIS against enumeration


@pytest.mark.parametrize(("n_visible", "n_hidden", "seed"),
                         [(4, 8, 0), (3, 12, 1), (6, 10, 2), (5, 12, 3)])
def test_ais_is_within_a_tenth_of_a_nat_of_enumeration(n_visible, n_hidden, seed):
    rbm = _tiny(n_visible, n_hidden, weight_scale=1.0, seed=seed)
    exact = rbm.exact_log_partition()
    mean, var = _model_moments(rbm)  # as if from data the model fits
    estimate = ais_log_partition(rbm, visible_mean=mean, visible_var=var, n_chains=200,
                                 n_temperatures=1000, seed=seed)
    print(f"V={n_visible} H={n_hidden} seed={seed}: AIS {estimate.log_z:.4f} ± "
          f"{estimate.log_z_std:.4f}, exact {exact:.4f}, difference "
          f"{estimate.log_z - exact:+.4f} nats; base {estimate.log_z_base:.4f}; "
          f"{estimate.effective_chains:.0f} effective chains of 200")
    # the weights matter: the answer is several nats away from the start of the path
    assert abs(exact - estimate.log_z_base) > 3.0
    assert abs(estimate.log_z - exact) < 0.1
    assert estimate.log_z_std > 0
    assert estimate.log_weights.shape == (200,) and estimate.method == "ais"


def test_ais_with_binary_visibles_matches_enumeration():
    rbm = _tiny(6, 8, weight_scale=1.0, seed=5, visible="binary")
    exact = rbm.exact_log_partition()
    estimate = ais_log_partition(rbm, visible_mean=np.full(6, 0.4), n_chains=200,
                                 n_temperatures=1000, seed=1)
    assert abs(estimate.log_z - exact) < 0.1


def test_ais_of_one_copy_stepped_units_matches_the_shifted_binary_enumeration():
    # Source: algebra: a stepped unit with one copy is a binary unit with its bias moved
    # by −½, so its log Z is the enumerated log Z of that binary model.
    stepped = _tiny(4, 8, weight_scale=1.0, seed=7, hidden="stepped", n_copies=1)
    binary = _tiny(4, 8, weight_scale=1.0, seed=7)
    binary.hidden_bias_ = stepped.hidden_bias_ - np.float32(0.5)
    exact = binary.exact_log_partition()
    mean, var = _model_moments(binary)
    estimate = ais_log_partition(stepped, visible_mean=mean, visible_var=var, n_chains=200,
                                 n_temperatures=1000, seed=3)
    assert abs(estimate.log_z - exact) < 0.1


def test_same_seed_same_estimate_and_seeds_differ():
    rbm = _tiny(3, 6, weight_scale=1.0, seed=9)
    kwargs = dict(visible_mean=np.zeros(3), visible_var=np.ones(3), n_chains=20,
                  n_temperatures=50)
    first, again = ais_log_partition(rbm, seed=1, **kwargs), ais_log_partition(rbm, seed=1,
                                                                                **kwargs)
    other = ais_log_partition(rbm, seed=2, **kwargs)
    np.testing.assert_array_equal(first.log_weights, again.log_weights)
    assert first.log_z != other.log_z


# ------------------------------------------------------------------ a known answer


@pytest.mark.parametrize(("hidden", "copies"), [("binary", None), ("stepped", None),
                                                ("relu", 25)])
@pytest.mark.parametrize("visible", ["gaussian", "binary"])
def test_zero_weights_give_the_closed_form(hidden, copies, visible):
    # closed form with W = 0: independent visibles (Gaussian integral Σ ½ log 2πσ², or
    # Σ softplus(b) for binary visibles) times independent hidden units (Σⱼ φ(cⱼ))
    rbm = _tiny(5, 4, weight_scale=0.0, seed=11, hidden=hidden, visible=visible, n_copies=6)
    n_copies = copies or rbm.n_copies
    kind = "binary" if hidden == "binary" else "stepped"
    hidden_part = sum(_phi(float(cj), kind, n_copies) for cj in rbm.hidden_bias_)
    b = rbm.visible_bias_.astype(np.float64)
    if visible == "gaussian":
        sigma = rbm.sigma_.astype(np.float64)
        closed = float(np.sum(0.5 * np.log(2 * np.pi * sigma**2))) + hidden_part
        # a base rate equal to the model: every importance weight is exactly 1
        matched = dict(visible_mean=b, visible_var=sigma**2)
        other = dict(visible_mean=b + 0.7, visible_var=2.0 * sigma**2)
    else:
        closed = float(np.logaddexp(0.0, b).sum()) + hidden_part
        matched = dict(visible_mean=1 / (1 + np.exp(-b)))
        other = dict(visible_mean=np.full(5, 0.5))
    exact = ais_log_partition(rbm, copies=copies, n_chains=10, n_temperatures=100, seed=0,
                              **matched)
    assert exact.log_z == pytest.approx(closed, abs=1e-9)
    assert np.all(np.abs(exact.log_weights) < 1e-9)
    # a base rate unlike the model: the transitions are exact draws, so AIS stays close
    annealed = ais_log_partition(rbm, copies=copies, n_chains=100, n_temperatures=300, seed=0,
                                 **other)
    assert annealed.log_z == pytest.approx(closed, abs=0.05)
    if hidden == "binary":
        assert rbm.exact_log_partition() == pytest.approx(closed, abs=1e-5)


# ------------------------------------------------------------------ the exactness switch


@pytest.mark.parametrize(("hidden", "n_hidden", "method"),
                         [("binary", 3, "exact"), ("binary", EXACT_MAX_HIDDEN, "exact"),
                          ("binary", EXACT_MAX_HIDDEN + 1, "ais"), ("stepped", 3, "ais"),
                          ("relu", 3, "ais")])
def test_auto_enumerates_up_to_twenty_binary_hiddens(hidden, n_hidden, method):
    rbm = _tiny(2, n_hidden, weight_scale=0.3, seed=1, hidden=hidden, n_copies=4)
    estimate = log_partition(rbm, visible_mean=np.zeros(2), visible_var=np.ones(2), copies=(
        20 if hidden == "relu" else None), n_chains=4, n_temperatures=10, seed=0)
    assert estimate.method == method
    if method == "exact":
        assert estimate.log_z == rbm.exact_log_partition() and estimate.log_z_std == 0.0
    else:
        assert estimate.n_chains == 4 and estimate.n_temperatures == 10


def test_exact_and_ais_requests_are_checked():
    relu = _tiny(2, 3, weight_scale=0.3, seed=1, hidden="relu")
    with pytest.raises(ParameterError, match="exact log Z needs binary"):
        log_partition(relu, visible_mean=np.zeros(2), visible_var=np.ones(2), method="exact")
    with pytest.raises(ParameterError, match="give copies"):
        ais_log_partition(relu, visible_mean=np.zeros(2), visible_var=np.ones(2))
    with pytest.raises(ParameterError, match="n_chains"):
        ais_log_partition(relu, visible_mean=np.zeros(2), visible_var=np.ones(2), copies=5,
                          n_chains=1)
    with pytest.raises(ParameterError, match="visible_var"):
        ais_log_partition(_tiny(2, 3, weight_scale=0.3, seed=1), visible_mean=np.zeros(2))


def test_relu_bound_tells_finite_from_infinite():
    small = _tiny(4, 3, weight_scale=0.05, seed=2, hidden="relu")
    assert relu_partition_bound(small)["finite"] is True
    large = _tiny(4, 3, weight_scale=3.0, seed=2, hidden="relu")
    bound = relu_partition_bound(large)
    assert bound["finite"] is False and bound["max_column_norm"] > 1
    # columns of norm 0.854 < 1 that point close together: along u = (1, 1)/√2 each has
    # w·u = 1.1/√2, so q(u) = 2 · 1.21/2 = 1.21 > 1 (worked by hand) and Z is infinite
    pair = _tiny(2, 2, weight_scale=0.0, seed=2, hidden="relu")
    pair.weights_ = np.array([[0.8, 0.3], [0.3, 0.8]], np.float32)
    pair.sigma_ = np.ones(2, np.float32)
    bound = relu_partition_bound(pair)
    assert bound["max_column_norm"] < 1 and bound["spectral_norm"] > 1
    assert bound["finite"] is False and bound["largest_q"] == pytest.approx(1.21, abs=1e-6)


def test_stepped_form_of_relu_equals_the_models_free_energy_on_the_data():
    # the copies rule of score(): K = ⌈max x + 15.5⌉ makes −F_K equal the model's rectified
    # free energy (within 5e-7 per unit, plus float32 rounding of the model's figure)
    rbm = _tiny(6, 8, weight_scale=1.5, seed=4, hidden="relu")
    rows = np.random.default_rng(0).normal(0.0, 2.0, (300, 6))
    probe = _annealing_path(rbm, np.zeros(6), np.ones(6), copies=1)
    inputs = rows @ probe.input_weights + probe.hidden_bias
    copies = math.ceil(inputs.max() + 15.5)
    path = _annealing_path(rbm, np.zeros(6), np.ones(6), copies=copies)
    minus_f = path.visible_terms(rows)[1] + path.hidden_term(rows @ path.input_weights, 1.0)
    np.testing.assert_allclose(-minus_f, rbm.free_energy(rows.astype(np.float32)),
                               rtol=2e-6, atol=8 * 5e-7 + 1e-4)


# ------------------------------------------------------------------ score and the command


@pytest.fixture(scope="module")
def small_cache(tmp_path_factory):
    """Eight short clips (tones and noise) framed with 8 bands and one frame of context."""
    root = tmp_path_factory.mktemp("score")
    rng = np.random.default_rng(8)
    t = np.arange(6400) / 16000
    for i in range(8):
        y = (0.3 * np.sin(2 * np.pi * (500.0 + 300 * i) * t) if i % 2
             else 0.1 * rng.standard_normal(t.size))
        sf.write(root / f"c{i}.wav", (y + 0.01 * rng.standard_normal(t.size)).astype(np.float32),
                 16000)
    cache = root / "cache"
    result = runner.invoke(app, ["frames", str(root), "--out", str(cache), "-q", "-j", "1",
                                 "--set", "frontend.n_mels=8", "--set", "frontend.context=1"])
    assert result.exit_code == 0, result.output
    return cache


@pytest.fixture(scope="module")
def binary_model(small_cache):
    return _fit_binary(small_cache, "binary.npz")


def _fit_binary(cache, name, *settings):
    """Six binary hidden units fitted for 2 epochs on ``cache``, ``--set`` each setting
    (without contrast normalisation unless a setting asks for it: see the next test)."""
    model = cache.parent / name
    settings = ("training.window_contrast=false", *settings)
    extra = [arg for setting in settings for arg in ("--set", setting)]
    result = runner.invoke(app, ["fit", str(cache), "--out", str(model), "--n-hidden", "6",
                                 "--hidden", "binary", "--epochs", "2", "--seed", "1", "-q",
                                 *extra])
    assert result.exit_code == 0, result.output
    return model


def test_a_contrast_normalised_model_is_not_scored(small_cache):
    # Normalising each window to zero mean and unit spread has no inverse (every window
    # and its louder copies map to one point), so no density of the windows follows.
    model = _fit_binary(small_cache, "contrast.npz", "training.window_contrast=true")
    with pytest.raises(ParameterError, match="contrast-normalised"):
        score(model, small_cache, method="exact")
    # and the error says how to fit a model that can be scored
    with pytest.raises(ParameterError, match=r"training\.window_contrast=false"):
        score(model, small_cache, method="exact")


def test_whitened_model_scores_its_windows_with_the_jacobian(small_cache):
    # Source: change of variables: the first layer models z = (w - m) W, so the density of
    # a standardised window w is p(z) |det W|; log Z exact by enumeration (6 binary units).
    model = _fit_binary(small_cache, "white.npz", "training.whiten=zca")
    report = score(model, small_cache, method="exact")
    pipe = load_pipeline(model)
    cache = FrameCache.open(small_cache)
    train_clips, _ = split_clips(len(cache), pipe.config.training.validation_fraction, seed=1)
    windows = np.concatenate([stack_context(cache.band_stats.standardise(
        cache.clip_frames(c)), 1) for c in train_clips])
    free = pipe.rbm.free_energy(pipe.prepare(windows)).astype(np.float64)
    log_det = np.linalg.slogdet(pipe.whitening[1].astype(np.float64))[1]
    train_set = next(s for s in report.sets if s.name == "train")
    assert train_set.log_likelihood == pytest.approx(
        -free.mean() - pipe.rbm.exact_log_partition() + log_det, abs=1e-3)


def test_score_command_exact_on_the_trainers_windows(small_cache, binary_model):
    result = runner.invoke(app, ["score", str(binary_model), str(small_cache), "--json"])
    assert result.exit_code == 0, result.output
    report = json.loads(result.output)
    assert report["method"] == "exact" and report["log_z_std"] == 0.0
    assert report["training_cache"] is True
    pipe = load_pipeline(binary_model)
    assert report["log_z"] == pytest.approx(pipe.rbm.exact_log_partition(), abs=1e-9)
    # the windows are the trainer's: its clip split, its standardisation, one per frame
    cache = FrameCache.open(small_cache)
    train_clips, val_clips = split_clips(len(cache),
                                          pipe.config.training.validation_fraction, seed=1)
    sets = {s["name"]: s for s in report["sets"]}
    for name, clips in (("train", train_clips), ("validation", val_clips)):
        windows = np.concatenate([stack_context(cache.band_stats.standardise(
            cache.clip_frames(c)), 1) for c in clips])
        free = pipe.rbm.free_energy(windows).astype(np.float64)
        assert sets[name]["n_windows"] == len(windows) and sets[name]["n_clips"] == len(clips)
        assert sets[name]["log_likelihood"] == pytest.approx(-free.mean() - report["log_z"],
                                                             abs=1e-4)
        # log-mel units: change of variables z = (x − mean)/scale per visible value
        jacobian = -3 * np.log(cache.band_stats.scale).sum()
        assert sets[name]["log_likelihood_logmel"] == pytest.approx(
            sets[name]["log_likelihood"] + jacobian, abs=1e-9)
    table = runner.invoke(app, ["score", str(binary_model), str(small_cache)])
    assert table.exit_code == 0 and "exact (enumerated 2^6" in table.output
    assert "nats per context window (3 frames x 8 bands = 24 values" in table.output


def test_score_command_runs_ais_for_rectified_units(small_cache):
    model = small_cache.parent / "relu.npz"
    assert runner.invoke(app, ["fit", str(small_cache), "--out", str(model), "--n-hidden", "5",
                               "--epochs", "1", "--seed", "2", "-q", "--set",
                               "training.window_contrast=false"]).exit_code == 0
    result = runner.invoke(app, ["score", str(model), str(small_cache), "--chains", "8",
                                 "--temperatures", "40", "--max-windows", "50", "-q"])
    assert result.exit_code == 0, result.output
    assert "AIS, 8 chains x 40 temperatures" in result.output
    assert "annealed as stepped units with" in result.output
    assert "the rectified model's own Z is" in result.output
    report = json.loads(runner.invoke(app, ["score", str(model), str(small_cache), "--chains",
                                            "8", "--temperatures", "40", "--max-windows", "50",
                                            "--json"]).output)
    assert all(s["n_windows"] <= 50 for s in report["sets"])
    assert all(math.isfinite(s["log_likelihood"]) for s in report["sets"])
    assert report["copies"] >= 16 and report["relu_bound"]["finite"] in (True, False, None)


def test_score_errors_are_one_line(small_cache, tmp_path, binary_model):
    result = runner.invoke(app, ["score", str(tmp_path / "none.npz"), str(small_cache)])
    assert result.exit_code == 1 and result.output.startswith("timbrel: error:")
    result = runner.invoke(app, ["score", str(binary_model), str(tmp_path / "nowhere")])
    assert result.exit_code == 1 and "timbrel: error:" in result.output
    assert runner.invoke(app, ["score", str(binary_model), str(small_cache), "--chains",
                               "1"]).exit_code == 2


def test_score_on_another_cache_scores_every_clip(small_cache, binary_model, tmp_path):
    # a cache of other clips with the same frame settings: held-out data, the model's own
    # standardisation
    rng = np.random.default_rng(1)
    for i in range(3):
        sf.write(tmp_path / f"n{i}.wav", (0.05 * rng.standard_normal(4000)).astype(np.float32),
                 16000)
    other = tmp_path / "other"
    assert runner.invoke(app, ["frames", str(tmp_path), "--out", str(other), "-q", "-j", "1",
                               "--set", "frontend.n_mels=8"]).exit_code == 0
    result = score(binary_model, other)
    assert not result.training_cache
    assert [s.name for s in result.sets] == ["all clips"]
    assert result.sets[0].n_windows == FrameCache.open(other).n_frames
