"""Tests of timbrel.windows: the standardised context windows the model sees."""

import sys
from pathlib import Path

import numpy as np
import pytest

from timbrel import ConfigError, ParameterError
from timbrel.cache import FrameCache, build_cache
from timbrel.config import load_config
from timbrel.frontend import stack_context
from timbrel.windows import (
    WindowBatches,
    check_config_against_cache,
    split_clips,
    window_sets,
    zca_whitening,
)

sys.path.insert(0, str(Path(__file__).parent / "data"))
import make_model_v1  # librosa chirps and tones, and their settings


@pytest.fixture(scope="module")
def cache(tmp_path_factory) -> FrameCache:
    root = tmp_path_factory.mktemp("windows")
    make_model_v1.write_audio(root / "audio")
    config = load_config(overrides=make_model_v1.OVERRIDES)
    build_cache(root / "audio", root / "cache", config=config, workers=1)
    return FrameCache.open(root / "cache")


@pytest.mark.parametrize(("n", "fraction", "held"), [(20, 0.25, 5), (2, 0.1, 1), (1, 0.5, 0),
                                                     (10, 0.0, 0)])
def test_validation_holds_out_whole_clips(n, fraction, held):
    train_clips, val_clips = split_clips(n, fraction, seed=1)
    assert len(val_clips) == held
    assert set(train_clips).isdisjoint(val_clips)
    assert sorted([*train_clips, *val_clips]) == list(range(n))
    again = split_clips(n, fraction, seed=1)
    assert all(np.array_equal(a, b) for a, b in zip(again, (train_clips, val_clips), strict=True))


def test_batches_are_standardised_context_windows_of_their_clips(cache):
    stats = cache.band_stats
    clips = np.array([0, 2, 3])
    batches = WindowBatches(cache, clips, stats, context=1, batch_size=16, chunk_frames=40,
                            max_frames=0)
    rows = np.concatenate(list(batches.epoch(np.random.default_rng(0))))
    expected = np.concatenate([stack_context(stats.standardise(cache.clip_frames(c)), 1)
                               for c in clips])
    assert rows.shape == expected.shape
    # the same multiset of rows: sort both lexicographically
    np.testing.assert_allclose(rows[np.lexsort(rows.T[::-1])],
                               expected[np.lexsort(expected.T[::-1])], atol=1e-6)
    assert all(len(b) <= 16 for b in batches.epoch(np.random.default_rng(0)))
    assert len(batches.sample(10, np.random.default_rng(1))) == 10


def test_window_sets_split_as_the_trainer_does(cache):
    config = load_config(overrides=make_model_v1.OVERRIDES)
    train, val = window_sets(cache, config, cache.band_stats, seed=3, batch_size=32)
    expected = split_clips(len(cache), config.training.validation_fraction, 3)
    assert np.array_equal(train.clips, expected[0]) and np.array_equal(val.clips, expected[1])
    assert train.n_frames + val.n_frames == cache.n_frames


def test_other_frame_settings_are_refused_by_name(cache):
    other = load_config(overrides=[*make_model_v1.OVERRIDES, "frontend.n_mels=20"])
    with pytest.raises(ConfigError, match="n_mels: config 20, cache 12"):
        check_config_against_cache(other, cache)
    # the context is not a frame setting: the same cache serves any context
    check_config_against_cache(
        load_config(overrides=[*make_model_v1.OVERRIDES, "frontend.context=4"]), cache)


@pytest.mark.parametrize("epsilon", [1e-3, 0.1, 1.0])
def test_zca_whitening_is_the_inverse_square_root_of_the_covariance(epsilon):
    # Source: ZCA whitening W = (C + eps I)^(-1/2) (Bell & Sejnowski 1997), computed with
    # scipy.linalg.sqrtm and numpy's inverse as the reference.
    import scipy.linalg

    rng = np.random.default_rng(4)
    mixing = rng.standard_normal((6, 6))
    x = rng.standard_normal((4000, 6)) @ mixing + rng.normal(size=6)
    mean, matrix = zca_whitening(x, epsilon)
    covariance = np.cov(x.T)
    reference = np.real(scipy.linalg.sqrtm(np.linalg.inv(covariance + epsilon * np.eye(6))))
    np.testing.assert_allclose(matrix, reference, rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(mean, x.mean(axis=0), rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(matrix, matrix.T, atol=1e-6)
    with pytest.raises(ParameterError):
        zca_whitening(x, 0.0)
