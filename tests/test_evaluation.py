"""Tests of timbrel.evaluation: pooling, the probe, and the spoken-word quality check."""

from __future__ import annotations

import numpy as np
import pyarrow.dataset as pads
import pytest
import soundfile as sf

from timbrel import ParameterError
from timbrel.cache import build_cache
from timbrel.config import load_config
from timbrel.evaluation import (
    CHOICE_C,
    CHOICE_POOLS,
    _choose,
    _cross_splits,
    kmeans_triangle,
    probe,
    read_clip_features,
)
from timbrel.export import export
from timbrel.pooling import pool_frames
from timbrel.training import train


@pytest.mark.parametrize("pools", [("mean",), ("mean", "max"), ("max", "std", "mean")])
def test_pool_frames_concatenates_numpy_poolings(pools):
    frames = np.random.default_rng(1).standard_normal((30, 4))
    ref = {"mean": frames.mean(0), "max": frames.max(0), "std": frames.std(0)}
    np.testing.assert_allclose(pool_frames(frames, pools), np.concatenate([ref[p] for p in pools]))


@pytest.mark.parametrize("pools", [(), ("median",)])
def test_pool_frames_refuses_unknown_pools(pools):
    with pytest.raises(ParameterError):
        pool_frames(np.ones((3, 2)), pools)


@pytest.fixture(scope="module")
def tones(tmp_path_factory):
    """Three classes of tone pattern, six clips each, split 4/2."""
    root = tmp_path_factory.mktemp("probe")
    rng = np.random.default_rng(2)
    sr = 16000
    t = np.arange(int(0.5 * sr)) / sr
    rows = ["path,label,split"]
    for _k, (name, freq) in enumerate([("low", 300.0), ("mid", 1200.0), ("high", 4000.0)]):
        for i in range(6):
            f = freq * (1 + 0.05 * rng.standard_normal())
            y = 0.3 * np.sin(2 * np.pi * f * t) + 0.02 * rng.standard_normal(t.size)
            sf.write(root / f"{name}{i}.wav", y.astype(np.float32), sr)
            rows.append(f"{name}{i}.wav,{name},{'train' if i < 4 else 'test'}")
    (root / "manifest.csv").write_text("\n".join(rows) + "\n")
    config = load_config(overrides=["frontend.n_mels=16", "frontend.context=1",
                                    "model.n_hidden=16", "model.epochs=3", "model.seed=1"])
    build_cache(root / "manifest.csv", root / "cache", config=config, workers=1)
    train(root / "cache", root / "model.npz", config=config)
    export(root / "manifest.csv", root / "model.npz", root / "ds", workers=1)
    return root


def test_clip_features_equal_pooled_frames_read_by_pyarrow(tones):
    sources, X, extra, meta = read_clip_features(tones / "ds", ("mean", "max"),
                                                 columns=["label"])
    table = pads.dataset(tones / "ds").to_table()  # outside reader: pyarrow.dataset
    for i, src in enumerate(sources):
        rows = table.filter(pads.field("source") == src)
        feats = np.stack(rows.column("features").to_numpy(zero_copy_only=False))
        np.testing.assert_allclose(X[i], pool_frames(feats, ("mean", "max")), rtol=1e-6,
                                   atol=1e-6)
    assert extra["label"][0] == "high" and meta["n_hidden"] == 16
    # a column the reader takes anyway is given once more as asked, not read twice
    again, Y, extra, _ = read_clip_features(tones / "ds", ("mean", "max"),
                                            columns=["source", "label"])
    assert again == sources and extra["source"] == sources
    np.testing.assert_array_equal(Y, X)


def test_probe_separates_tones_and_reports_baselines(tones):
    # three tones an octave and more apart: any reasonable feature set separates them
    result = probe(tones / "ds")
    assert [s.name for s in result.scores] == ["rbm-relu", "mfcc", "logmel", "kmeans-16"]
    assert result.classes == ["high", "low", "mid"]
    assert (result.n_train, result.n_test) == (12, 6)
    for score in result.scores:
        assert score.accuracy == pytest.approx(1.0)
        assert np.sum(score.confusion) == 6
    assert "macro-F1" in result.table()
    # each row says how its clips were pooled: the learned features and the k-means code
    # by the default, MFCCs by mean and std, log-mel frames by mean and max
    assert [s.pooling for s in result.scores] == ["max", "mean,std", "mean,max", "max"]
    assert result.to_dict()["scores"][0]["pooling"] == "max"
    assert all(s.pooling in line for s, line in zip(
        result.scores, result.table().splitlines()[2:], strict=False))


@pytest.mark.parametrize("pools", [("mean",), ("max", "std")])
def test_probe_reports_the_pooling_it_was_given(tones, pools):
    score = probe(tones / "ds", baselines=(), pools=pools).scores[0]
    assert score.pooling == ",".join(pools)
    assert score.n_features % len(pools) == 0


def test_choice_of_pooling_and_c_matches_scikit_learns_grouped_grid_search():
    # Source: scikit-learn's GridSearchCV over C with GroupKFold folds, run once per pooling;
    # the best mean score wins, the first on ties (GridSearchCV's own rule within a grid).
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import GridSearchCV, GroupKFold
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    rng = np.random.default_rng(4)
    n, d = 90, 6
    y = np.repeat(np.array(["a", "b", "c"]), n // 3)
    groups = np.tile(np.array(["o1", "o2", "o3", "o4", "o5", "o6"]), n // 6)
    signal = (y == "b").astype(float)[:, None] - (y == "c")[:, None]
    blocks = {"mean": rng.standard_normal((n, d)), "max": rng.standard_normal((n, d)),
              "std": rng.standard_normal((n, d)) + 0.6 * signal}
    pooled = {p: np.hstack([blocks[q] for q in p]) for p in CHOICE_POOLS}
    train_idx = np.arange(n - 12)
    got = _choose(pooled, y, groups, train_idx, seed=0)

    best, best_score = None, -1.0
    for p in CHOICE_POOLS:
        search = GridSearchCV(
            make_pipeline(StandardScaler(), LogisticRegression(max_iter=3000, random_state=0)),
            {"logisticregression__C": list(CHOICE_C)}, cv=GroupKFold(3))
        search.fit(pooled[p][train_idx], y[train_idx], groups=groups[train_idx])
        if search.best_score_ > best_score:
            best_score = search.best_score_
            best = (p, search.best_params_["logisticregression__C"])
    assert got == best
    assert "std" in got[0]  # the informative block was found


@pytest.fixture(scope="module")
def tones_by_origin(tones):
    """The tones exported again with an origin per clip: two per class among the training
    clips, a third for the test clips."""
    rows = (tones / "manifest.csv").read_text().splitlines()
    out = [rows[0] + ",origin"]
    for row in rows[1:]:
        index = int(row.split(",")[0][-5])
        out.append(f"{row},{'o1' if index < 2 else 'o2' if index < 4 else 'o3'}")
    (tones / "by_origin.csv").write_text("\n".join(out) + "\n")
    export(tones / "by_origin.csv", tones / "model.npz", tones / "ds_origin", workers=1)
    return tones / "ds_origin"


def test_probe_chooses_pooling_and_c_for_every_feature_set(tones_by_origin):
    result = probe(tones_by_origin, choose_by="origin")
    assert "'origin'" in result.chosen_by and "chosen by" in result.table()
    assert [s.name for s in result.scores] == ["rbm-relu", "mfcc", "logmel", "kmeans-16"]
    for score in result.scores:
        pools = tuple(score.pooling.split(","))
        assert pools in CHOICE_POOLS and score.c in CHOICE_C
        assert score.n_features % len(pools) == 0
        assert score.accuracy == pytest.approx(1.0)  # tones octaves apart, as above
    # without the choice, every feature set keeps C = 1
    assert {s.c for s in probe(tones_by_origin).scores} == {1.0}
    # clips with no shared origin: each clip its own, folded by the source column
    by_clip = probe(tones_by_origin, choose_by="source", baselines=())
    assert "'source'" in by_clip.chosen_by and by_clip.scores[0].c in CHOICE_C


def test_folds_without_a_split_column_keep_each_origin_on_one_side():
    # 6 origins of 4 clips, 3 classes: every clip is tested once, no origin is on both
    # sides of a fold, and every fold holds each class on both sides (stratified)
    y = np.array(["a", "b", "c", "a"] * 6)
    groups = np.repeat([f"o{i}" for i in range(6)], 4).astype(object)
    splits, scheme = _cross_splits(y, groups, 5, 0, dataset="ds", group_name="origin")
    assert len(splits) == 5 and "'origin' on one side" in scheme
    assert sorted(np.concatenate([test for _, test in splits]).tolist()) == list(range(24))
    for train_idx, test_idx in splits:
        assert not set(groups[train_idx]) & set(groups[test_idx])
        assert set(y[train_idx]) == set(y[test_idx]) == {"a", "b", "c"}
    # without origins: scikit-learn's StratifiedKFold, as before
    from sklearn.model_selection import StratifiedKFold

    plain, _ = _cross_splits(y, None, 5, 0, dataset="ds", group_name=None)
    expected = StratifiedKFold(5, shuffle=True, random_state=0).split(np.zeros(24), y)
    for (a, b), (c, d) in zip(plain, expected, strict=True):
        np.testing.assert_array_equal(a, c)
        np.testing.assert_array_equal(b, d)
    with pytest.raises(ParameterError, match="one origin"):
        _cross_splits(y, np.array(["x"] * 24, dtype=object), 5, 0, dataset="ds",
                      group_name="origin")


def test_probe_without_a_split_column_folds_by_origin(tones_by_origin):
    result = probe(tones_by_origin, split_column=None, choose_by="origin", baselines=())
    assert "3-fold over clips, each 'origin' on one side" in result.table()
    assert result.scores[0].c in CHOICE_C


def test_probe_choice_needs_two_origins_among_training_clips(tones_by_origin):
    # every training clip has the same value in "split": one origin, nothing to fold over
    with pytest.raises(ParameterError, match="at least two origins; found 1"):
        probe(tones_by_origin, choose_by="split", baselines=())
    with pytest.raises(ParameterError, match="no column"):
        probe(tones_by_origin, choose_by="speaker", baselines=())


def test_kmeans_triangle_code_from_scikit_learns_distances():
    # Source: the triangle activation max(0, mean_k(z) - z_k) of Coates, Lee & Ng (2011)
    # applied to the distances of scikit-learn's KMeans.transform.
    from sklearn.cluster import KMeans

    x = np.random.default_rng(3).standard_normal((300, 5)).astype(np.float32)
    km = KMeans(n_clusters=7, n_init=1, random_state=0).fit(x)
    z = km.transform(x)
    expected = np.maximum(z.mean(axis=1, keepdims=True) - z, 0.0)
    got = kmeans_triangle(x, km.cluster_centers_)
    np.testing.assert_allclose(got, expected, rtol=1e-4, atol=1e-4)
    assert np.all((got > 0).sum(axis=1) < 7)  # every window leaves some units at zero


def test_probe_without_split_uses_folds_over_clips(tones):
    result = probe(tones / "ds", split_column=None, baselines=("kmeans",), folds=3)
    assert "3-fold" in result.scheme
    assert result.n_test == 18  # every clip scored once
    assert len(result.scores) == 2
    # the k-means peer is fitted per fold, and its confusion counts every clip once
    assert np.sum(result.scores[1].confusion) == 18


def test_probe_errors_name_the_problem(tones, tmp_path):
    with pytest.raises(ParameterError, match="no column"):
        probe(tones / "ds", label="species")
    with pytest.raises(ParameterError, match="baseline"):
        probe(tones / "ds", baselines=("spectral",))
    with pytest.raises(ParameterError, match="folds = 1 must be >= 2"):
        probe(tones / "ds", baselines=(), split_column=None, folds=1)
    with pytest.raises(ParameterError, match=r"not a readable Parquet dataset|not a timbrel"):
        probe(tmp_path)


@pytest.mark.speech
def test_default_relu_features_beat_chance_on_unseen_voices(spoken_words, tmp_path):
    # Real speech from espeak-ng (Debian): 12 words, train voices and test voices disjoint.
    # The default configuration's relu features must beat chance (1/12) by a wide margin.
    config = load_config()
    build_cache(spoken_words, tmp_path / "cache", config=config)
    train(tmp_path / "cache", tmp_path / "model.npz", config=config)
    export(tmp_path / "cache", tmp_path / "model.npz", tmp_path / "ds")
    result = probe(tmp_path / "ds", baselines=("mfcc",))
    rbm, mfcc = result.scores
    assert rbm.name == "rbm-relu"
    assert rbm.accuracy > 0.8, result.table()
    assert mfcc.accuracy > 0.5, result.table()  # the baseline itself is sane
