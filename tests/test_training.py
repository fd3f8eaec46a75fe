"""Tests of timbrel.training: checkpoints, resume, the divergence guard through the
trainer, and the model file's provenance."""

from __future__ import annotations

import csv

import numpy as np
import pytest
import soundfile as sf

from timbrel import ConfigError, DivergenceError
from timbrel.cache import FrameCache, build_cache
from timbrel.config import load_config
from timbrel.frontend import stack_context
from timbrel.pipeline import describe_model, load_pipeline
from timbrel.training import checkpoint_path, history_path, train


@pytest.fixture(scope="module")
def cache_dir(tmp_path_factory):
    """A small cache of two kinds of synthetic sound (chirps and noise bursts)."""
    root = tmp_path_factory.mktemp("train")
    audio = root / "audio"
    audio.mkdir()
    rng = np.random.default_rng(5)
    sr = 16000
    t = np.arange(int(0.6 * sr)) / sr
    for i in range(12):
        if i % 2:
            y = 0.3 * np.sin(2 * np.pi * (400 + 800 * i / 12) * t * (1 + t))
        else:
            y = 0.2 * rng.standard_normal(t.size) * (t < 0.3)
        y = y + 0.01 * rng.standard_normal(t.size)
        sf.write(audio / f"c{i:02d}.wav", y.astype(np.float32), sr)
    config = load_config(overrides=["frontend.n_mels=16", "frontend.context=2"])
    build_cache(audio, root / "cache", config=config, workers=1)
    return root / "cache"


def _config(**model):
    params = {"n_hidden": 24, "epochs": 3, "seed": 3, "batch_size": 64, **model}
    overrides = ["frontend.n_mels=16", "frontend.context=2", "training.chunk_frames=300"]
    overrides += [f"model.{k}={v!r}" if isinstance(v, str) else f"model.{k}={v}"
                  for k, v in params.items()]
    return load_config(overrides=overrides)


def test_train_writes_model_history_and_checkpoint(tmp_path, cache_dir):
    out = tmp_path / "m.npz"
    result = train(cache_dir, out, config=_config())
    assert out.is_file() and history_path(out).is_file() and checkpoint_path(out).is_file()
    assert [h["epoch"] for h in result.history] == [1, 2, 3]
    for key in ("recon_error", "val_recon_error", "free_energy_gap", "mean_hidden_activity",
                "dead_fraction", "sigma_min", "sigma_max"):
        assert np.isfinite(result.history[-1][key]), key
    with open(history_path(out), newline="") as fh:
        assert len(list(csv.DictReader(fh))) == 3
    pipe = load_pipeline(out)
    cache = FrameCache.open(cache_dir)
    assert pipe.config.frontend.context == 2
    np.testing.assert_allclose(pipe.band_mean, cache.band_stats.mean, rtol=1e-6)
    assert pipe.rbm.n_features_in_ == 5 * 16
    summary = describe_model(out)
    assert summary["n_hidden"] == 24 and len(summary["sigma_per_band"]) == 16
    assert summary["epochs"] == 3


def test_same_seed_same_model_and_resume_equals_uninterrupted(tmp_path, cache_dir):
    full = tmp_path / "full.npz"
    train(cache_dir, full, config=_config(epochs=4))
    again = tmp_path / "again.npz"
    train(cache_dir, again, config=_config(epochs=4))
    a, b = load_pipeline(full).rbm, load_pipeline(again).rbm
    np.testing.assert_array_equal(a.weights_, b.weights_)
    # stop after 2 epochs, then resume to 4 from the checkpoint
    part = tmp_path / "part.npz"
    train(cache_dir, part, config=_config(epochs=2))
    ckpt = checkpoint_path(part)
    resumed = tmp_path / "resumed.npz"
    checkpoint_path(resumed).write_bytes(ckpt.read_bytes())
    with pytest.raises(ConfigError, match=r"another configuration \(model\.n_hidden=24 "
                       r"there, 25 now\)"):
        train(cache_dir, resumed, config=_config(epochs=4, n_hidden=25), resume=True)
    # the epoch count is the one setting a resume may change
    result = train(cache_dir, resumed, config=_config(epochs=4), resume=True)
    assert [h["epoch"] for h in result.history] == [1, 2, 3, 4]
    c = load_pipeline(resumed).rbm
    np.testing.assert_array_equal(c.weights_, a.weights_)
    np.testing.assert_array_equal(c.sigma_, a.sigma_)


def test_a_checkpoint_from_before_window_contrast_resumes_only_as_it_was_fitted(
        tmp_path, cache_dir):
    # A checkpoint written before training.window_contrast existed lacks the key and was
    # fitted without it; resumed under today's default (on) it would continue a model fed
    # other inputs. Rewrite a checkpoint's header without the key, as such a file reads.
    from timbrel.model import read_checkpoint, write_checkpoint

    part = tmp_path / "part.npz"
    off = ["training.window_contrast=false"]
    train(cache_dir, part, config=_config(epochs=2).with_overrides(off))
    header, state = read_checkpoint(checkpoint_path(part), advice="")
    del header["config"]["training"]["window_contrast"]
    resumed = tmp_path / "resumed.npz"
    write_checkpoint(checkpoint_path(resumed), state, header)
    # the error names the setting, with both values as --set takes them
    with pytest.raises(ConfigError, match=r"another configuration \(training\."
                       r"window_contrast=false there, true now\)"):
        train(cache_dir, resumed, config=_config(epochs=3), resume=True)
    result = train(cache_dir, resumed, config=_config(epochs=3).with_overrides(off),
                   resume=True)
    assert [h["epoch"] for h in result.history] == [1, 2, 3]


def test_divergence_is_rolled_back_and_reported(tmp_path, cache_dir):
    lines = []
    try:
        result = train(cache_dir, tmp_path / "hot.npz", log=lines.append,
                       config=_config(learning_rate=5.0, variance_learning_rate=1.0,
                                      max_rollbacks=8, max_step=0))
    except DivergenceError as exc:
        assert "diverge" in str(exc).lower()
        return
    assert any("roll" in line.lower() for line in lines), lines
    assert sum(h["rollbacks"] for h in result.history) >= 1
    rbm = load_pipeline(tmp_path / "hot.npz").rbm
    assert np.isfinite(rbm.weights_).all() and np.isfinite(rbm.sigma_).all()


def test_hopeless_learning_rate_stops_with_a_clear_error(tmp_path, cache_dir):
    with pytest.raises(DivergenceError):
        train(cache_dir, tmp_path / "x.npz",
              config=_config(learning_rate=1e6, variance_learning_rate=1e3, max_rollbacks=1,
                             initial_momentum=0.0, final_momentum=0.0, max_step=0))
    assert not (tmp_path / "x.npz").exists()


def test_front_end_that_disagrees_with_the_cache_is_refused(tmp_path, cache_dir):
    config = load_config(overrides=["frontend.n_mels=20", "model.epochs=1"])
    with pytest.raises(ConfigError, match="n_mels: config 20, cache 16"):
        train(cache_dir, tmp_path / "m.npz", config=config)


def test_unknown_model_key_is_refused(tmp_path, cache_dir):
    config = load_config(overrides=["frontend.n_mels=16", "model.hiden=4"])
    with pytest.raises(ConfigError, match="unknown key"):
        train(cache_dir, tmp_path / "m.npz", config=config)


def test_a_layer_stacked_on_a_model_learns_from_its_features(tmp_path, cache_dir):
    from timbrel.pipeline import describe_text, load_pipeline

    base = tmp_path / "base.npz"
    train(cache_dir, base, config=_config())
    top = tmp_path / "top.npz"
    result = train(cache_dir, top, config=_config(n_hidden=8, hidden="binary"), on=base)
    assert [h["epoch"] for h in result.history] == [1, 2, 3]
    below, stacked = load_pipeline(base), load_pipeline(top)
    # the first layer travels inside the stacked file, bit for bit
    for name in ("weights_", "visible_bias_", "hidden_bias_", "sigma_"):
        assert np.array_equal(getattr(stacked.rbm, name), getattr(below.rbm, name)), name
    assert stacked.top.n_features_in_ == 24 and stacked.top.n_hidden == 8
    frames = FrameCache.open(cache_dir).clip_frames(1)
    first = stacked.features(frames, "first")
    np.testing.assert_array_equal(first, below.features(frames))
    top_features = stacked.features(frames)
    assert top_features.shape == (len(frames), 8)
    assert np.all((top_features > 0) & (top_features < 1))  # binary units: probabilities
    both = stacked.features(frames, "all")
    np.testing.assert_array_equal(both, np.hstack([first, top_features]))
    # the top layer sees each first-layer feature standardised over the training windows
    layer = stacked.upper[0]
    np.testing.assert_allclose(top_features, layer.rbm.transform(
        (first - layer.input_mean) / layer.input_scale), rtol=1e-5, atol=1e-6)
    text = describe_text(describe_model(top))
    assert "stack      80 -> 24 relu -> 8 binary" in text
    # a third layer on the stack keeps both lower layers
    third = tmp_path / "third.npz"
    train(cache_dir, third, config=_config(n_hidden=4), on=top)
    deep = load_pipeline(third)
    assert [u.rbm.n_hidden for u in deep.upper] == [8, 4]
    np.testing.assert_allclose(deep.features(frames, "all")[:, :32],
                               stacked.features(frames, "all"), rtol=1e-6)


def test_contrast_normalised_training_and_a_stack_on_it(tmp_path, cache_dir):
    # The model sees each standardised window normalised to zero mean and unit spread and
    # then whitened (the order of Coates, Lee & Ng 2011), in training and in its features;
    # a layer stacked on it keeps that front end.
    from timbrel.pipeline import contrast_normalise, whiten

    base = tmp_path / "contrast.npz"
    train(cache_dir, base, config=_config().with_overrides(
        ["training.window_contrast=true", "training.whiten=zca"]))
    pipe = load_pipeline(base)
    assert pipe.config.training.window_contrast
    frames = FrameCache.open(cache_dir).clip_frames(1)
    windows = stack_context(pipe.standardise(frames), 2)
    np.testing.assert_allclose(
        pipe.features(frames),
        pipe.rbm.transform(whiten(contrast_normalise(windows), *pipe.whitening)), rtol=1e-5)
    top = tmp_path / "top.npz"
    train(cache_dir, top, config=_config(n_hidden=6), on=base)
    stacked = load_pipeline(top)
    assert stacked.config.training.window_contrast
    np.testing.assert_allclose(stacked.features(frames, "first"), pipe.features(frames))


@pytest.mark.parametrize("epsilon", [0.1, 10.0])
def test_whitened_windows_keep_unit_variance_on_average(tmp_path, cache_dir, epsilon):
    # Common practice (Hinton's practical guide, 2010, sec. 13.2): Gaussian visible units
    # start at sigma = 1 on data scaled to unit variance. A partial whitening (large
    # epsilon shrinks every direction of variance below epsilon) must not change that scale.
    from timbrel.pipeline import whiten

    model = tmp_path / "white.npz"
    train(cache_dir, model, config=_config().with_overrides(
        ["training.whiten=zca", f"training.whiten_epsilon={epsilon}",
         "training.window_contrast=false"]))  # the whitening alone, on the windows as cached
    pipe = load_pipeline(model)
    cache = FrameCache.open(cache_dir)
    windows = np.concatenate([stack_context(pipe.standardise(cache.clip_frames(i)), 2)
                              for i in range(len(cache))])
    white = whiten(windows, *pipe.whitening)
    assert 0.8 < float(np.mean(np.square(white))) < 1.25


def test_whitened_training_and_a_stack_on_it(tmp_path, cache_dir):
    from timbrel.pipeline import load_pipeline, whiten

    base = tmp_path / "white.npz"
    config = _config().with_overrides(["training.whiten=zca", "training.whiten_epsilon=0.1",
                                       "training.window_contrast=false"])
    train(cache_dir, base, config=config)
    pipe = load_pipeline(base)
    mean, matrix = pipe.whitening
    assert matrix.shape == (80, 80) and np.allclose(matrix, matrix.T, atol=1e-5)
    frames = FrameCache.open(cache_dir).clip_frames(2)
    windows = stack_context(pipe.standardise(frames), 2)
    np.testing.assert_allclose(pipe.features(frames),
                               pipe.rbm.transform(whiten(windows, mean, matrix)), rtol=1e-5)
    top = tmp_path / "top.npz"
    train(cache_dir, top, config=_config(n_hidden=6), on=base)
    stacked = load_pipeline(top)
    np.testing.assert_array_equal(stacked.whitening[1], matrix)
    np.testing.assert_allclose(stacked.features(frames, "first"), pipe.features(frames))
