"""Knowing whether the features are good: a probe classifier beside hand-made baselines.

:func:`probe` pools each clip's frame features from an exported dataset, trains a
standardised multinomial logistic regression (scikit-learn) on the ``train`` split and
reports on the ``test`` split, side by side with peers computed from the same audio in
the same run: MFCCs with deltas, the model's own log-mel frames and a k-means code.
Without a split column it uses stratified k-fold over clips, so frames of one clip never
sit on both sides. Given a column naming each clip's origin (speaker, sound set, site),
every feature set alike gets its pooling and regularisation chosen by cross-validation
over the training clips' origins, so no feature set wins by a setting fitted to another.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from . import store
from ._errors import ParameterError
from .audio import load
from .frontend import BandStats, FrontEnd, stack_context
from .pipeline import whiten
from .pooling import POOLS, PROBE_POOLS, ClipPool, check_pools, pool_frames
from .windows import zca_whitening

__all__ = ["BASELINES", "BASELINE_POOLS", "CHOICE_C", "CHOICE_POOLS", "KMEANS_EPSILON",
           "ProbeResult", "ProbeScore", "kmeans_triangle", "probe", "read_clip_features"]

BASELINES = ("mfcc", "logmel", "kmeans")
#: How each peer pools its frames over a clip: MFCCs by mean and spread, as usual; the
#: log-mel frames by mean and maximum; the k-means code as the learned features are
#: pooled (``pools``), so that learning the features is the only difference.
BASELINE_POOLS: dict[str, tuple[str, ...]] = {"mfcc": ("mean", "std"), "logmel": ("mean", "max")}
N_MFCC = 20
#: Regulariser of the k-means peer's whitening, and the windows it is fitted on at most.
KMEANS_EPSILON = 0.1
KMEANS_WINDOWS = 50000
#: The probe's inverse regularisation (scikit-learn's ``C``) when it is not chosen.
PROBE_C = 1.0
#: What the probe chooses between for each feature set when told the clips' origins
#: (``choose_by``): poolings over the clip, and ``C``, in order of preference on ties.
CHOICE_POOLS = (("max",), ("mean", "max"), ("max", "std"), ("mean", "std"))
CHOICE_C = (1.0, 0.1, 0.01)
#: Folds over the training clips' origins for that choice (fewer if fewer origins).
CHOICE_FOLDS = 3

Pooled = dict[tuple[str, ...], np.ndarray]
"""One feature set pooled each way it may be: pooling -> array (n_clips, n_features)."""


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
    # a requested column may be one read anyway (``source``: each clip its own origin)
    for batch in ds.to_batches(columns=list(dict.fromkeys(["source", *feature_cols, *columns]))):
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
    c: float  # the logistic regression's inverse regularisation
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
    chosen_by: str = ""  # how pooling and C were chosen, if they were

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return dataclasses.asdict(self)

    def table(self) -> str:
        """A side-by-side table for a person."""
        counts = (f"{self.n_train} train / {self.n_test} test clips" if "fold" not in self.scheme
                  else f"{self.n_test} clips, each scored once")
        lines = [f"probe: multinomial logistic regression, {self.scheme}; "
                 f"{counts}, {len(self.classes)} classes"]
        if self.chosen_by:
            lines.append(f"pooling and C of each feature set chosen by {self.chosen_by}")
        lines.append(f"{'features':<16}{'pooled':<10}{'C':>6}{'dims':>6}{'accuracy':>10}"
                     f"{'macro-F1':>10}")
        for s in self.scores:
            lines.append(f"{s.name:<16}{s.pooling:<10}{s.c:>6g}{s.n_features:>6}"
                         f"{s.accuracy:>10.3f}{s.macro_f1:>10.3f}")
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
                     k: int, pools: Sequence[tuple[str, ...]], seed: int) -> Pooled:
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
    return _pool_each_way((kmeans_triangle(whiten(w, mean, matrix), centres) for w in windows),
                          pools)


def _pool_each_way(clips: Iterable[np.ndarray], pools: Sequence[tuple[str, ...]]) -> Pooled:
    """Each clip's frames (n_frames, n_features) pooled in each of the ways asked (every
    pooling computed once per clip, then picked out)."""
    union = tuple(dict.fromkeys(q for p in pools for q in p))
    return _split_pooled(np.array([pool_frames(frames, union) for frames in clips]), union,
                         pools)


def _baseline_features(kind: str, paths: Sequence[str | Path], fe: FrontEnd,
                       pools: Sequence[tuple[str, ...]]) -> Pooled:
    if kind == "logmel":
        return _pool_each_way(_frames_of(paths, fe), pools)
    return _pool_each_way((_mfcc(p, fe) for p in paths), pools)


def _split_pooled(X: np.ndarray, union: Sequence[str], pools: Sequence[tuple[str, ...]]
                  ) -> Pooled:
    """Poolings picked out of clip features pooled as ``union`` (blocks side by side)."""
    blocks = dict(zip(union, np.split(X, len(union), axis=1), strict=True))
    return {p: np.hstack([blocks[q] for q in p]) for p in pools}


def _accuracy(X: np.ndarray, y: np.ndarray, fit: np.ndarray, held: np.ndarray, c: float,
              seed: int) -> tuple[np.ndarray, float]:
    """Predictions for ``held`` of the standardised logistic regression fitted on ``fit``,
    and their accuracy."""
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=3000, C=c,
                                                               random_state=seed))
    model.fit(X[fit], y[fit])
    predicted = model.predict(X[held])
    return predicted, float(np.mean(predicted == y[held]))


def _choose(pooled: Pooled, y: np.ndarray, groups: np.ndarray, train_idx: np.ndarray,
            seed: int) -> tuple[tuple[str, ...], float]:
    """The pooling and C with the best mean accuracy over folds of the training clips that
    keep each origin (``groups``) on one side (scikit-learn's ``GroupKFold``)."""
    from sklearn.model_selection import GroupKFold

    n_groups = len(set(groups[train_idx].tolist()))
    if n_groups < 2:
        raise ParameterError("choosing pooling and C needs training clips of at least two "
                             f"origins; found {n_groups}")
    folds = list(GroupKFold(min(CHOICE_FOLDS, n_groups)).split(
        train_idx, y[train_idx], groups[train_idx]))

    def inner(option: tuple[tuple[str, ...], float]) -> float:
        return float(np.mean([_accuracy(pooled[option[0]], y, train_idx[a], train_idx[b],
                                        option[1], seed)[1] for a, b in folds]))

    return max(((p, c) for p in pooled for c in CHOICE_C), key=inner)


def _score(name: str, pooled: Pooled, y: np.ndarray, classes: list[str],
           splits: list[tuple[np.ndarray, np.ndarray]], seed: int,
           groups: np.ndarray | None = None) -> ProbeScore:
    """Score one feature set over the splits: with ``groups``, pooling and C chosen on each
    split's training clips (:func:`_choose`); otherwise its one pooling with C = 1."""
    from sklearn.metrics import confusion_matrix, f1_score, recall_score

    truth, predicted, options = [], [], []
    for train_idx, test_idx in splits:
        option = _choose(pooled, y, groups, train_idx, seed) if groups is not None \
            else (next(iter(pooled)), PROBE_C)
        truth.append(y[test_idx])
        predicted.append(_accuracy(pooled[option[0]], y, train_idx, test_idx, option[1],
                                   seed)[0])
        options.append(option)
    t, p = np.concatenate(truth), np.concatenate(predicted)
    recall = recall_score(t, p, labels=classes, average=None, zero_division=0)
    # over several folds, the option chosen most often (the first on ties) is reported
    pools, inverse = max(options, key=options.count)
    return ProbeScore(
        name=name, pooling=",".join(pools), c=inverse, n_features=int(pooled[pools].shape[1]),
        accuracy=float(np.mean(t == p)),
        macro_f1=float(f1_score(t, p, labels=classes, average="macro", zero_division=0)),
        per_class_recall={c: float(r) for c, r in zip(classes, recall, strict=True)},
        confusion=confusion_matrix(t, p, labels=classes).tolist())


def _kmeans_score(paths: Sequence[str | Path], fe: FrontEnd, k: int,
                  pools: Sequence[tuple[str, ...]], y: np.ndarray, classes: list[str],
                  splits: list[tuple[np.ndarray, np.ndarray]], seed: int,
                  groups: np.ndarray | None) -> ProbeScore:
    """The k-means peer, fitted on each split's training clips alone."""
    frames = _frames_of(paths, fe)
    parts = []
    for train_idx, test_idx in splits:
        pooled = _kmeans_features(frames, train_idx, context=fe.config.context, k=k,
                                  pools=pools, seed=seed)
        parts.append(_score(f"kmeans-{k}", pooled, y, classes, [(train_idx, test_idx)], seed,
                            groups))
    if len(parts) == 1:
        return parts[0]
    return _merge_folds(parts, classes)


def _merge_folds(parts: list[ProbeScore], classes: list[str]) -> ProbeScore:
    """One score from per-fold scores (each test clip counted once; the pooling and C
    reported are those chosen most often)."""
    confusion = np.sum([np.array(p.confusion) for p in parts], axis=0)
    n = confusion.sum()
    recall = {c: float(confusion[i, i] / max(confusion[i].sum(), 1))
              for i, c in enumerate(classes)}
    precision = np.diag(confusion) / np.maximum(confusion.sum(axis=0), 1)
    rec = np.array(list(recall.values()))
    f1 = np.where(precision + rec > 0, 2 * precision * rec / np.maximum(precision + rec, 1e-12),
                  0.0)
    options = [(p.pooling, p.c, p.n_features) for p in parts]
    pooling, inverse, n_features = max(options, key=options.count)
    return ProbeScore(name=parts[0].name, pooling=pooling, c=inverse, n_features=n_features,
                      accuracy=float(np.trace(confusion) / n), macro_f1=float(f1.mean()),
                      per_class_recall=recall, confusion=confusion.tolist())


def _cross_splits(y: np.ndarray, groups: np.ndarray | None, folds: int, seed: int, *,
                  dataset: str | Path, group_name: str | None
                  ) -> tuple[list[tuple[np.ndarray, np.ndarray]], str]:
    """Folds over clips, stratified by class, for a dataset with no train/test column; with
    ``groups`` each origin stays on one side of every fold (scikit-learn's
    ``StratifiedGroupKFold``), as in the choice inside each fold.

    Returns the ``(train, test)`` index pairs and a phrase saying how they were made.
    """
    from sklearn.model_selection import StratifiedGroupKFold, StratifiedKFold

    if folds < 2:
        raise ParameterError(f"folds = {folds} must be >= 2")
    k = int(min(folds, min(np.unique(y, return_counts=True)[1])))
    if k < 2:
        raise ParameterError(f"{dataset}: a class has fewer than 2 clips; cannot cross-validate")
    if groups is None:
        cv = StratifiedKFold(n_splits=k, shuffle=True, random_state=seed)
        return list(cv.split(y, y)), f"stratified {k}-fold over clips"
    k = min(k, len(set(groups.tolist())))
    if k < 2:
        raise ParameterError(f"{dataset}: column {group_name!r} names one origin; folds "
                             "that keep each origin on one side need at least two")
    cv = StratifiedGroupKFold(n_splits=k, shuffle=True, random_state=seed)
    return (list(cv.split(y, y, groups)),
            f"stratified {k}-fold over clips, each {group_name!r} on one side")


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
    choose_by: str | None = None,
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
        ``folds``-fold cross-validation over clips is used instead (with ``choose_by``,
        folds that keep each origin on one side).
    baselines : sequence of {"mfcc", "logmel", "kmeans"}, default all three
        Peers computed from the same audio in the same run, through the same classifier:
        MFCCs (20) with deltas, mean- and std-pooled; the model's own log-mel frames,
        mean- and max-pooled; and context windows (the model's context) standardised and
        ZCA-whitened on the training clips, coded with the triangle activation of k-means
        centres fitted on those windows, k the model's hidden count (Coates, Lee & Ng
        2011), pooled as the learned features.
    pools : sequence of {"mean", "max", "std"}, default ("max",)
        Pooling of the learned frame features over each clip (see :data:`PROBE_POOLS`).
        Not used with ``choose_by``.
    folds : int >= 2, default 5
    seed : int, default 0
    audio_root : str or Path, optional
        Where the clips' audio lives (for the baselines); default: the folder recorded in
        the dataset at export.
    choose_by : str, optional
        Column naming each clip's origin (speaker, sound set, recording site). Given it,
        every feature set alike, learned or peer, gets its pooling (one of
        :data:`CHOICE_POOLS`) and C (one of :data:`CHOICE_C`) chosen by the best mean
        accuracy over 3 folds of the training clips that keep each origin on one side,
        then is refitted on all training clips with that choice. Held-out clips play no
        part in the choice. Without it, the learned and k-means features are pooled by
        ``pools`` and the peers as :data:`BASELINE_POOLS` says, all with C = 1.

    Returns
    -------
    ProbeResult
        ``scores[0]`` is the learned features', then one per baseline.

    Raises
    ------
    ParameterError
        If a column is missing, the labels hold one class, the splits are empty, or
        ``choose_by`` leaves fewer than two origins among the training clips.

    Examples
    --------
    >>> result = probe("out/features", choose_by="origin")  # doctest: +SKIP
    >>> print(result.table())  # doctest: +SKIP
    """
    bad = [b for b in baselines if b not in BASELINES]
    if bad:
        raise ParameterError(f"baseline(s) {bad} not among {', '.join(BASELINES)}")
    names = open_dataset(dataset).schema.names
    split_name = split_column if split_column is not None and split_column in names else None
    columns = list(dict.fromkeys([label, *([split_name] if split_name is not None else []),
                                  *([choose_by] if choose_by is not None else [])]))
    union = POOLS if choose_by is not None else tuple(check_pools(pools))
    sources, X, extra, meta = read_clip_features(dataset, union, columns=columns)
    own = CHOICE_POOLS if choose_by is not None else [tuple(check_pools(pools))]
    groups = np.array(extra[choose_by], dtype=object) if choose_by is not None else None
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
        splits, scheme = _cross_splits(y, groups, folds, seed, dataset=dataset,
                                       group_name=choose_by)
    scores = [_score(f"rbm-{meta.get('hidden', '?')}", _split_pooled(X, union, own), y,
                     classes, splits, seed, groups)]
    if baselines:
        root = str(audio_root or meta.get("audio_root", "."))
        from .config import FrontEndConfig

        fe = FrontEnd(FrontEndConfig(**meta["frontend"]))
        paths = [store.join(root, s) for s in sources]
        for kind in baselines:
            if kind == "kmeans":
                scores.append(_kmeans_score(paths, fe, int(meta["n_hidden"]), own, y, classes,
                                            splits, seed, groups))
            else:
                theirs = own if choose_by is not None else [BASELINE_POOLS[kind]]
                scores.append(_score(kind, _baseline_features(kind, paths, fe, theirs), y,
                                     classes, splits, seed, groups))
    chosen_by = "" if choose_by is None else \
        f"{CHOICE_FOLDS}-fold cross-validation over the training clips' {choose_by!r}"
    return ProbeResult(classes=classes, scheme=scheme, n_train=len(splits[0][0]),
                       n_test=int(sum(len(t) for _, t in splits)), scores=scores,
                       chosen_by=chosen_by)
