"""Reading trained models for inference: timbrel.pipeline."""

import shutil
import sys
from pathlib import Path

import numpy as np
import pytest

from timbrel import ConfigError, ModelFileError
from timbrel.frontend import FrontEnd
from timbrel.pipeline import describe_model, describe_text, load_pipeline

DATA = Path(__file__).parent / "data"
sys.path.insert(0, str(DATA))
import make_model_v1  # noqa: E402  (the fixture's own audio and settings)


def test_model_file_of_the_first_format_gives_the_same_features():
    # A model file written by the release before the model layer was split (format 1,
    # tests/data/make_model_v1.py): it still loads, and its features of a librosa chirp
    # are the ones that release computed, to float32 rounding.
    expected = np.load(DATA / "model_v1_expected.npz")
    pipe = load_pipeline(DATA / "model_v1.npz")
    frames = FrontEnd(pipe.config.frontend).frames(make_model_v1.probe_signal(),
                                                   make_model_v1.SR)
    np.testing.assert_array_equal(frames, expected["frames"])
    np.testing.assert_allclose(pipe.features(frames), expected["features"], rtol=1e-6,
                               atol=1e-7)
    # its history lived in the metadata then; the pipeline still finds it
    assert [row["epoch"] for row in pipe.history] == [1, 2]


def test_describe_reads_the_old_file_once_and_renders(tmp_path):
    pipe = load_pipeline(DATA / "model_v1.npz")
    summary = describe_model(DATA / "model_v1.npz", pipe)
    assert summary["n_visible"] == 36 and summary["n_hidden"] == 10
    assert summary["epochs"] == 2 and len(summary["sigma_per_band"]) == 12
    # band centres rise with the band index (mel spacing, common practice)
    centres = [row["centre_hz"] for row in summary["sigma_per_band"]]
    assert centres == sorted(centres) and centres[-1] < 4000
    text = describe_text(summary)
    assert "36 gaussian visible = 3 frames x 12 bands" in text and "10 relu hidden" in text


def test_old_checkpoint_resumes_training(tmp_path):
    # A checkpoint of the first format (it stored the trainer's history in its header)
    # resumes: one more epoch on the same cache, and the history goes on from 2 to 3.
    from timbrel.cache import build_cache
    from timbrel.config import load_config
    from timbrel.training import checkpoint_path, train

    make_model_v1.write_audio(tmp_path / "audio")
    # the settings it was made with: window contrast did not exist yet (off), and a
    # resume under today's default (on) is refused as another configuration
    config = load_config(None, overrides=make_model_v1.OVERRIDES)
    build_cache(tmp_path / "audio", tmp_path / "cache", config=config)
    out = tmp_path / "model_v1.npz"
    shutil.copy(DATA / "model_v1.checkpoint.npz", checkpoint_path(out))
    with pytest.raises(ConfigError, match="another configuration"):
        train(tmp_path / "cache", out, config=config, model={"epochs": 3}, resume=True)
    config = config.with_overrides(["training.window_contrast=false"])
    result = train(tmp_path / "cache", out, config=config, model={"epochs": 3}, resume=True)
    assert [row["epoch"] for row in result.history] == [1, 2, 3]
    assert "val_recon_error" in result.history[-1]


def test_a_bare_model_file_is_not_a_pipeline(tmp_path):
    from timbrel.model import RBM

    x = np.random.default_rng(0).standard_normal((64, 4)).astype(np.float32)
    RBM(n_hidden=3, epochs=1, seed=0).fit(x).save(tmp_path / "bare.npz")
    with pytest.raises(ModelFileError, match="not a trained timbrel pipeline"):
        load_pipeline(tmp_path / "bare.npz")


def test_contrast_normalise_follows_its_definition_and_ignores_level_and_gain():
    # Source: the per-input brightness and contrast normalisation of Coates, Lee & Ng 2011
    # (AISTATS), x' = (x - mean(x)) / sqrt(var(x) + eps), computed here with numpy; a shift
    # of a window's level and a change of its scale leave it unchanged (exactly as eps -> 0).
    from timbrel.pipeline import contrast_normalise

    x = np.random.default_rng(3).standard_normal((50, 33)).astype(np.float32)
    expected = (x - x.mean(1, keepdims=True)) / np.sqrt(x.var(1, keepdims=True) + 0.1)
    np.testing.assert_allclose(contrast_normalise(x, 0.1), expected, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(contrast_normalise(4.0 * x + 7.0, 1e-9),
                               contrast_normalise(x, 1e-9), rtol=1e-4, atol=1e-5)
    out = contrast_normalise(x, 1e-9)
    np.testing.assert_allclose(out.mean(1), 0.0, atol=1e-6)
    np.testing.assert_allclose(out.std(1), 1.0, rtol=1e-5)
    # a flat window (silence after standardisation) stays finite: all zeros
    assert np.array_equal(contrast_normalise(np.full((1, 5), 3.0)), np.zeros((1, 5), np.float32))
