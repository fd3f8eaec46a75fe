"""Knowing whether the features are good: a probe classifier beside hand-made baselines.

:func:`probe` pools each clip's frame features from an exported dataset, trains a
standardised multinomial logistic regression (scikit-learn) on the ``train`` split and
reports on the ``test`` split, side by side with two baselines computed from the same
audio in the same run: MFCCs with deltas and the model's own log-mel frames. Without a
split column it uses stratified k-fold over clips, so frames of one clip never sit on
both sides.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from . import store
from ._errors import ParameterError
from .audio import load
from .frontend import BandStats, FrontEnd, stack_context
from .pipeline import whiten
from .pooling import PROBE_POOLS, ClipPool, pool_frames
from .windows import zca_whitening

__all__ = ["BASELINES", "BASELINE_POOLS", "KMEANS_EPSILON", "ProbeResult", "ProbeScore",
           "kmeans_triangle", "probe", "read_clip_features"]

BASELINES = ("mfcc", "logmel", "kmeans")
#: How each peer pools its frames over a clip: MFCCs by mean and spread, as usual; the
#: log-mel frames by mean and maximum; the k-means code as the learned features are
#: pooled (``pools``), so that learning the features is the only difference.
BASELINE_POOLS = {"mfcc": ("mean", "std"), "logmel": ("mean", "max")}
N_MFCC = 20
#: Regulariser of the k-means peer's whitening, and the windows it is fitted on at most.
KMEANS_EPSILON = 0.1
KMEANS_WINDOWS = 50000


def open_dataset(dataset: str | Path) -> Any:
    """A ``pyarrow.dataset.Dataset`` of an exported folder, local or at a URL.

    Raises
    ------
    ParameterError
        If it is missing or not readable as Parquet.
    """
    import pyarrow.dataset as pads

    try:
        path, fs = store.arrow_location(dataset)
        return pads.dataset(path, filesystem=fs, format="parquet")
    except (OSError, ValueError, store.StoreError) as exc:
        raise ParameterError(f"{dataset}: not a readable Parquet dataset ({exc})") from None


def read_clip_features(dataset: str | Path, pools: Sequence[str], *, columns: Sequence[str] = ()
                       ) -> tuple[list[str], np.ndarray, dict[str, list[str]], dict[str, Any]]:
    """Pool an exported frame dataset into one row per clip, streaming record batches.

    Returns
    -------
    sources : list of str
        Clip names, sorted.
    features : np.ndarray, shape (n_clips, len(pools) * n_hidden)
    extra : dict of column name to list of str
        The requested manifest columns, one value per clip.
    metadata : dict
        The dataset's timbrel metadata (model checksum, front end, audio root, ...).
    """
    ds = open_dataset(dataset)
    schema = ds.schema
    raw_meta = (schema.metadata or {}).get(b"timbrel")
    if raw_meta is None or ("features" not in schema.names and "h0000" not in schema.names):
        raise ParameterError(f"{dataset}: not a timbrel feature dataset")
    metadata = json.loads(raw_meta)
    missing = [c for c in columns if c not in schema.names]
    if missing:
        raise ParameterError(f"{dataset}: no column(s) {missing}; columns are {schema.names}")
    wide = "features" not in schema.names
    feature_cols = [n for n in schema.names if n.startswith("h") and n[1:].isdigit()] if wide \
        else ["features"]
    n_hidden = int(metadata["n_hidden"])
    acc: dict[str, dict[str, Any]] = {}
    for batch in ds.to_batches(columns=["source", *feature_cols, *columns]):
        src = batch.column(0).to_numpy(zero_copy_only=False)
        if wide:
            feats = np.column_stack([batch.column(c).to_numpy() for c in feature_cols])
        else:
            feats = batch.column(1).values.to_numpy().reshape(-1, n_hidden)
        feats = feats.astype(np.float64)
        order = np.argsort(src, kind="stable")
        src, feats = src[order], feats[order]
        extras = {c: batch.column(c).to_numpy(zero_copy_only=False)[order] for c in columns}
        cuts = np.flatnonzero(src[1:] != src[:-1]) + 1
        for a, b in zip(np.r_[0, cuts], np.r_[cuts, len(src)], strict=True):
            entry = acc.setdefault(src[a], {"pool": ClipPool(n_hidden),
                                            "extra": {c: str(extras[c][a]) for c in columns}})
            entry["pool"].add(feats[a:b])
    sources = sorted(acc)
    rows = [np.concatenate(list(acc[s]["pool"].result(pools).values())) for s in sources]
    features = np.array(rows) if rows else np.zeros((0, len(pools) * n_hidden))
    extra = {c: [acc[s]["extra"][c] for s in sources] for c in columns}
    return sources, features, extra, metadata


@dataclasses.dataclass
class ProbeScore:
    """One feature set's result on the held-out clips."""

    name: str
    pooling: str  # the poolings over each clip, comma-separated (e.g. "max", "mean,std")
    n_features: int
    accuracy: float
    macro_f1: float
    per_class_recall: dict[str, float]
    confusion: list[list[int]]


@dataclasses.dataclass
class ProbeResult:
    """Scores of the learned features and the baselines, plus how they were obtained."""

    classes: list[str]
    scheme: str
    n_train: int
    n_test: int
    scores: list[ProbeScore]

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return dataclasses.asdict(self)

    def table(self) -> str:
        """A side-by-side table for a person."""
        counts = (f"{self.n_train} train / {self.n_test} test clips" if "fold" not in self.scheme
                  else f"{self.n_test} clips, each scored once")
        lines = [f"probe: multinomial logistic regression, {self.scheme}; "
                 f"{counts}, {len(self.classes)} classes",
                 f"{'features':<16}{'pooled':<10}{'dims':>6}{'accuracy':>10}{'macro-F1':>10}"]
        for s in self.scores:
            lines.append(f"{s.name:<16}{s.pooling:<10}{s.n_features:>6}{s.accuracy:>10.3f}"
                         f"{s.macro_f1:>10.3f}")
        lines.append("per-class recall:")
        width = max(len(c) for c in self.classes) + 2
        lines.append(" " * width + "".join(f"{s.name[:12]:>14}" for s in self.scores))
        for c in self.classes:
            lines.append(f"{c:<{width}}" + "".join(f"{s.per_class_recall[c]:>14.3f}"
                                                   for s in self.scores))
        best = self.scores[0]
        lines.append(f"confusion matrix of {best.name} (rows true, columns predicted):")
        lines.append(" " * width + "".join(f"{c[:6]:>7}" for c in self.classes))
        for c, row in zip(self.classes, best.confusion, strict=True):
            lines.append(f"{c:<{width}}" + "".join(f"{v:>7d}" for v in row))
        return "\n".join(lines)


def _frames_of(paths: Sequence[str | Path], fe: FrontEnd) -> list[np.ndarray]:
    c = fe.config
    return [fe.frames(load(path, sr=c.sample_rate, channel=c.channel), c.sample_rate)
            for path in paths]


def _mfcc(path: str | Path, fe: FrontEnd) -> np.ndarray:
    """MFCCs with deltas from librosa, with the model's own framing and mel settings."""
    import librosa

    c = fe.config
    y = load(path, sr=c.sample_rate, channel=c.channel)
    mfcc = librosa.feature.mfcc(
        y=y, sr=c.sample_rate, n_mfcc=N_MFCC, n_fft=c.fft_length, hop_length=c.hop_length,
        win_length=c.win_length, window=c.window, n_mels=c.n_mels, fmin=c.fmin,
        fmax=c.upper_frequency, htk=c.mel_scale == "htk", center=False)
    width = min(9, mfcc.shape[1] if mfcc.shape[1] % 2 else mfcc.shape[1] - 1)
    delta = librosa.feature.delta(mfcc, width=width) if width >= 3 else np.zeros_like(mfcc)
    return np.vstack([mfcc, delta]).T


def kmeans_triangle(windows: np.ndarray, centres: np.ndarray) -> np.ndarray:
    """The triangle code of Coates, Lee & Ng (2011): ``max(0, mean_k(z) - z_k)`` with
    ``z_k`` the distance of a window to centre ``k``.

    Parameters
    ----------
    windows : np.ndarray, shape (n, d)
    centres : np.ndarray, shape (k, d)

    Returns
    -------
    np.ndarray, shape (n, k), float32
        About half the units are zero for each window: those farther than average.

    Examples
    --------
    >>> import numpy as np
    >>> kmeans_triangle(np.array([[0.0, 0.0]]), np.array([[1.0, 0.0], [3.0, 0.0]]))
    array([[1., 0.]], dtype=float32)
    """
    x = np.asarray(windows, np.float32)
    c = np.asarray(centres, np.float32)
    squared = (np.square(x).sum(axis=1)[:, None] - 2.0 * (x @ c.T)
               + np.square(c).sum(axis=1)[None, :])
    z = np.sqrt(np.maximum(squared, 0.0))
    return np.maximum(z.mean(axis=1, keepdims=True) - z, 0.0).astype(np.float32)


def _kmeans_features(frames: Sequence[np.ndarray], train_idx: np.ndarray, *, context: int,
                     k: int, pools: Sequence[str], seed: int) -> np.ndarray:
    """The k-means peer: context windows of the clips, standardised and ZCA-whitened with
    statistics of the training clips, coded by k-means centres fitted on those windows."""
    from sklearn.cluster import MiniBatchKMeans

    stats = BandStats(frames[0].shape[1])
    for i in train_idx:
        stats.update(frames[i])
    windows = [stack_context(stats.standardise(f), context) for f in frames]
    sample = np.concatenate([windows[i] for i in train_idx])
    rng = np.random.default_rng([seed, 0xC0A7])
    if len(sample) > KMEANS_WINDOWS:
        sample = sample[rng.choice(len(sample), KMEANS_WINDOWS, replace=False)]
    mean, matrix = zca_whitening(sample, KMEANS_EPSILON)
    centres = MiniBatchKMeans(n_clusters=min(k, len(sample)), random_state=seed, n_init=1,
                              batch_size=4096, max_iter=50).fit(
        whiten(sample, mean, matrix)).cluster_centers_
    return np.array([pool_frames(kmeans_triangle(whiten(w, mean, matrix), centres), pools)
                     for w in windows])


def _baseline_features(kind: str, paths: Sequence[str | Path], fe: FrontEnd) -> np.ndarray:
    if kind == "logmel":
        return np.array([pool_frames(f, BASELINE_POOLS["logmel"]) for f in _frames_of(paths, fe)])
    return np.array([pool_frames(_mfcc(p, fe), BASELINE_POOLS["mfcc"]) for p in paths])


def _score(name: str, pools: Sequence[str], X: np.ndarray, y: np.ndarray,
           classes: list[str], splits: list[tuple[np.ndarray, np.ndarray]], seed: int
           ) -> ProbeScore:
    from sklearn.linear_model import LogisticRegression
    from sklearn.metrics import confusion_matrix, f1_score, recall_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    truth, predicted = [], []
    for train_idx, test_idx in splits:
        model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=3000, C=1.0,
                                                                   random_state=seed))
        model.fit(X[train_idx], y[train_idx])
        truth.append(y[test_idx])
        predicted.append(model.predict(X[test_idx]))
    t, p = np.concatenate(truth), np.concatenate(predicted)
    recall = recall_score(t, p, labels=classes, average=None, zero_division=0)
    return ProbeScore(
        name=name, pooling=",".join(pools), n_features=int(X.shape[1]),
        accuracy=float(np.mean(t == p)),
        macro_f1=float(f1_score(t, p, labels=classes, average="macro", zero_division=0)),
        per_class_recall={c: float(r) for c, r in zip(classes, recall, strict=True)},
        confusion=confusion_matrix(t, p, labels=classes).tolist())


def _kmeans_score(paths: Sequence[str | Path], fe: FrontEnd, k: int, pools: Sequence[str],
                  y: np.ndarray, classes: list[str],
                  splits: list[tuple[np.ndarray, np.ndarray]], seed: int) -> ProbeScore:
    """The k-means peer, fitted on each split's training clips alone."""
    frames = _frames_of(paths, fe)
    parts = []
    for train_idx, test_idx in splits:
        X = _kmeans_features(frames, train_idx, context=fe.config.context, k=k, pools=pools,
                             seed=seed)
        parts.append(_score(f"kmeans-{k}", pools, X, y, classes, [(train_idx, test_idx)], seed))
    if len(parts) == 1:
        return parts[0]
    return _merge_folds(parts, classes)


def _merge_folds(parts: list[ProbeScore], classes: list[str]) -> ProbeScore:
    """One score from per-fold scores (each test clip counted once)."""
    confusion = np.sum([np.array(p.confusion) for p in parts], axis=0)
    n = confusion.sum()
    recall = {c: float(confusion[i, i] / max(confusion[i].sum(), 1))
              for i, c in enumerate(classes)}
    precision = np.diag(confusion) / np.maximum(confusion.sum(axis=0), 1)
    rec = np.array(list(recall.values()))
    f1 = np.where(precision + rec > 0, 2 * precision * rec / np.maximum(precision + rec, 1e-12),
                  0.0)
    first = parts[0]
    return ProbeScore(name=first.name, pooling=first.pooling, n_features=first.n_features,
                      accuracy=float(np.trace(confusion) / n), macro_f1=float(f1.mean()),
                      per_class_recall=recall, confusion=confusion.tolist())


def probe(
    dataset: str | Path,
    *,
    label: str = "label",
    split_column: str | None = "split",
    baselines: Sequence[str] = BASELINES,
    pools: Sequence[str] = PROBE_POOLS,
    folds: int = 5,
    seed: int = 0,
    audio_root: str | Path | None = None,
) -> ProbeResult:
    """Train and score a probe classifier on learned features and on baselines.

    Parameters
    ----------
    dataset : str or Path
        A frame dataset written by :func:`timbrel.export.export`.
    label : str, default "label"
        Column holding each clip's class.
    split_column : str or None, default "split"
        Column with ``train`` / ``test`` per clip. If None or absent, stratified
        ``folds``-fold cross-validation over clips is used instead.
    baselines : sequence of {"mfcc", "logmel", "kmeans"}, default all three
        Peers computed from the same audio in the same run, through the same classifier:
        MFCCs (20) with deltas, mean- and std-pooled; the model's own log-mel frames,
        mean- and max-pooled; and context windows (the model's context) standardised and
        ZCA-whitened on the training clips, coded with the triangle activation of k-means
        centres fitted on those windows, k the model's hidden count (Coates, Lee & Ng
        2011), pooled as the learned features.
    pools : sequence of {"mean", "max", "std"}, default ("max",)
        Pooling of the learned frame features over each clip (see :data:`PROBE_POOLS`).
    folds : int >= 2, default 5
    seed : int, default 0
    audio_root : str or Path, optional
        Where the clips' audio lives (for the baselines); default: the folder recorded in
        the dataset at export.

    Returns
    -------
    ProbeResult
        ``scores[0]`` is the learned features', then one per baseline.
    """
    bad = [b for b in baselines if b not in BASELINES]
    if bad:
        raise ParameterError(f"baseline(s) {bad} not among {', '.join(BASELINES)}")
    names = open_dataset(dataset).schema.names
    split_name = split_column if split_column is not None and split_column in names else None
    columns = [label, *([split_name] if split_name is not None else [])]
    sources, X, extra, meta = read_clip_features(dataset, pools, columns=columns)
    y = np.array(extra[label])
    classes = sorted(set(y.tolist()))
    if len(classes) < 2:
        raise ParameterError(f"{dataset}: column {label!r} holds fewer than two classes")
    if split_name is not None:
        split = np.array(extra[split_name], dtype=object)
        train_idx, test_idx = np.flatnonzero(split == "train"), np.flatnonzero(split == "test")
        if len(train_idx) == 0 or len(test_idx) == 0:
            raise ParameterError(f"{dataset}: column {split_name!r} needs both 'train' and "
                                 "'test' clips")
        splits = [(train_idx, test_idx)]
        scheme = f"train/test from column {split_name!r}"
    else:
        from sklearn.model_selection import StratifiedKFold

        if folds < 2:
            raise ParameterError(f"folds = {folds} must be >= 2")
        counts = min(np.unique(y, return_counts=True)[1])
        k = int(min(folds, counts))
        if k < 2:
            raise ParameterError(f"{dataset}: a class has fewer than 2 clips; "
                                 "cannot cross-validate")
        splits = list(StratifiedKFold(n_splits=k, shuffle=True, random_state=seed).split(X, y))
        scheme = f"stratified {k}-fold over clips"
    scores = [_score(f"rbm-{meta.get('hidden', '?')}", pools, X, y, classes, splits, seed)]
    if baselines:
        root = str(audio_root or meta.get("audio_root", "."))
        from .config import FrontEndConfig

        fe = FrontEnd(FrontEndConfig(**meta["frontend"]))
        paths = [store.join(root, s) for s in sources]
        for kind in baselines:
            if kind == "kmeans":
                scores.append(_kmeans_score(paths, fe, int(meta["n_hidden"]), pools, y, classes,
                                            splits, seed))
            else:
                scores.append(_score(kind, BASELINE_POOLS[kind],
                                     _baseline_features(kind, paths, fe), y, classes, splits,
                                     seed))
    return ProbeResult(classes=classes, scheme=scheme, n_train=len(splits[0][0]),
                       n_test=int(sum(len(t) for _, t in splits)), scores=scores)
