"""Do the features find sound events in time? A frame-level probe scored on segments.

:func:`probe_events` reads a dataset exported with ``--events`` (each frame carries the
labels of the annotated events covering its centre), trains a one-vs-rest logistic
regression on the training clips' frames, smooths each class's frame decisions with a
short median filter over time, and scores the test clips with the segment-based F1 and
error rate of Mesaros, Heittola & Virtanen (2016) on 1 s segments, beside MFCC and
log-mel frames of the same audio through the same classifier and filter.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from . import store
from ._errors import ParameterError
from .audio import load
from .config import FrontEndConfig
from .evaluation import open_dataset
from .events import SegmentScores, segment_scores
from .frontend import FrontEnd

__all__ = ["DETECTION_BASELINES", "MEDIAN_FRAMES", "DetectionResult", "probe_events"]

DETECTION_BASELINES = ("mfcc", "logmel")
#: Frames of the median filter over each class's decisions: 9 frames, 90 ms at a 10 ms
#: hop. Smoothing frame decisions with a median filter of a few tens of milliseconds
#: before scoring is common practice in sound event detection baselines.
MEDIAN_FRAMES = 9
#: Training frames used at most (evenly spaced over the training clips), which bounds
#: the classifier's time on long collections.
MAX_TRAIN_FRAMES = 60000
N_MFCC = 20


@dataclasses.dataclass
class _Clip:
    source: str
    split: str
    features: np.ndarray          # (n_frames, n_features)
    labels: list[list[str]]       # per frame
    centres: np.ndarray           # (n_frames,) seconds


def _read_clips(dataset: str | Path, split_column: str) -> tuple[list[_Clip], dict[str, Any]]:
    ds = open_dataset(dataset)
    names = ds.schema.names
    raw_meta = (ds.schema.metadata or {}).get(b"timbrel")
    if raw_meta is None or "features" not in names:
        raise ParameterError(f"{dataset}: not a timbrel feature dataset in the vector layout")
    if "events" not in names:
        raise ParameterError(f"{dataset}: no 'events' column; export with --events FILE")
    if split_column not in names:
        raise ParameterError(f"{dataset}: no column {split_column!r} with train/test per clip")
    meta = json.loads(raw_meta)
    fe = FrontEndConfig(**meta["frontend"])
    half_window = fe.fft_length / 2 / fe.sample_rate
    table = ds.to_table(columns=["source", "frame", "start_s", "features", "events",
                                 split_column]).sort_by([("source", "ascending"),
                                                         ("frame", "ascending")])
    sources = table.column("source").to_numpy(zero_copy_only=False)
    n_hidden = int(meta["n_hidden"])
    features = table.column("features").combine_chunks().values.to_numpy().reshape(-1, n_hidden)
    events = table.column("events").to_pylist()
    starts = table.column("start_s").to_numpy()
    split = table.column(split_column).to_numpy(zero_copy_only=False)
    cuts = np.r_[0, np.flatnonzero(sources[1:] != sources[:-1]) + 1, len(sources)]
    clips = [_Clip(str(sources[a]), str(split[a]), features[a:b], events[a:b],
                   starts[a:b] + half_window) for a, b in itertools.pairwise(cuts)]
    return clips, meta


@dataclasses.dataclass
class DetectionScore:
    """One feature set's segment-based scores on the test clips."""

    name: str
    n_features: int
    segment_f1: float
    error_rate: float
    precision: float
    recall: float
    per_class: dict[str, dict[str, float]]


@dataclasses.dataclass
class DetectionResult:
    """The frame probe's scores, and how they were obtained."""

    classes: list[str]
    n_train_clips: int
    n_test_clips: int
    n_train_frames: int
    segment_seconds: float
    median_frames: int
    scores: list[DetectionScore]

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form (each score has ``segment_f1`` and ``error_rate``)."""
        return dataclasses.asdict(self)

    def table(self) -> str:
        """A side-by-side table for a person."""
        lines = [f"frame probe: one-vs-rest logistic regression on {self.n_train_frames} frames "
                 f"of {self.n_train_clips} train clips, median filter of {self.median_frames} "
                 f"frames; scored on {self.n_test_clips} test clips in "
                 f"{self.segment_seconds:g} s segments (Mesaros et al. 2016)",
                 f"{'features':<16}{'dims':>6}{'seg-F1':>9}{'ER':>8}{'prec':>8}{'recall':>8}"]
        for s in self.scores:
            lines.append(f"{s.name:<16}{s.n_features:>6}{s.segment_f1:>9.3f}{s.error_rate:>8.3f}"
                         f"{s.precision:>8.3f}{s.recall:>8.3f}")
        lines.append("per-class segment F1 (reference segments):")
        width = max(len(c) for c in self.classes) + 2
        lines.append(" " * width + "".join(f"{s.name[:12]:>14}" for s in self.scores))
        for c in self.classes:
            n = self.scores[0].per_class[c]["n_reference"]
            lines.append(f"{c:<{width}}" + "".join(f"{s.per_class[c]['f1']:>14.3f}"
                                                   for s in self.scores) + f"   ({n})")
        return "\n".join(lines)


def _targets(labels: Sequence[list[str]], classes: Sequence[str]) -> np.ndarray:
    column = {c: i for i, c in enumerate(classes)}
    out = np.zeros((len(labels), len(classes)), bool)
    for i, frame in enumerate(labels):
        for label in frame:
            out[i, column[label]] = True
    return out


def _segment_roll(active: np.ndarray, centres: np.ndarray, segment: float) -> np.ndarray:
    """Per-segment activity: a class is active in a segment when one of its frames is."""
    n_segments = max(1, math.ceil(float(centres[-1]) / segment + 1e-9))
    index = np.minimum((centres // segment).astype(int), n_segments - 1)
    roll = np.zeros((n_segments, active.shape[1]), bool)
    np.logical_or.at(roll, index, active)
    return roll


def _score(name: str, train: list[np.ndarray], test: list[np.ndarray], train_y: np.ndarray,
           test_clips: list[_Clip], classes: list[str], *, median_frames: int,
           segment: float, seed: int) -> DetectionScore:
    from scipy.ndimage import median_filter
    from sklearn.linear_model import LogisticRegression
    from sklearn.multiclass import OneVsRestClassifier
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    X = np.vstack(train)
    model = make_pipeline(StandardScaler(), OneVsRestClassifier(
        LogisticRegression(max_iter=2000, random_state=seed)))
    model.fit(X, train_y)
    reference, estimated = [], []
    for clip, feats in zip(test_clips, test, strict=True):
        decided = model.predict_proba(feats) >= 0.5
        if median_frames > 1:
            decided = median_filter(decided, size=(median_frames, 1), mode="nearest")
        reference.append(_segment_roll(_targets(clip.labels, classes), clip.centres, segment))
        estimated.append(_segment_roll(decided, clip.centres, segment))
    s: SegmentScores = segment_scores(np.vstack(reference), np.vstack(estimated), classes,
                                      segment_seconds=segment)
    return DetectionScore(name=name, n_features=int(X.shape[1]), segment_f1=s.f1,
                          error_rate=s.error_rate, precision=s.precision, recall=s.recall,
                          per_class=s.per_class)


def _baseline_frames(kind: str, path: str | Path, fe: FrontEndConfig, n_frames: int) -> np.ndarray:
    import librosa

    y = load(path, sr=fe.sample_rate, channel=fe.channel)
    if kind == "logmel":
        frames = FrontEnd(fe).frames(y, fe.sample_rate)
    else:  # MFCCs with deltas from librosa, with the model's own framing and mel settings
        mfcc = librosa.feature.mfcc(
            y=y, sr=fe.sample_rate, n_mfcc=N_MFCC, n_fft=fe.fft_length, hop_length=fe.hop_length,
            win_length=fe.win_length, window=fe.window, n_mels=fe.n_mels, fmin=fe.fmin,
            fmax=fe.upper_frequency, htk=fe.mel_scale == "htk", center=False)
        width = min(9, mfcc.shape[1] if mfcc.shape[1] % 2 else mfcc.shape[1] - 1)
        delta = librosa.feature.delta(mfcc, width=width) if width >= 3 else np.zeros_like(mfcc)
        frames = np.vstack([mfcc, delta]).T
    if len(frames) != n_frames:
        raise ParameterError(f"{path}: {len(frames)} {kind} frames against {n_frames} exported")
    return frames


def probe_events(
    dataset: str | Path,
    *,
    split_column: str = "split",
    baselines: Sequence[str] = DETECTION_BASELINES,
    median_frames: int = MEDIAN_FRAMES,
    segment_seconds: float = 1.0,
    seed: int = 0,
    audio_root: str | Path | None = None,
) -> DetectionResult:
    """Train a frame classifier on the train clips and score event detection on the test clips.

    Parameters
    ----------
    dataset : str or Path
        A frame dataset exported with ``events`` (``timbrel export --events FILE``) in the
        vector layout, with a ``split_column`` of ``train`` / ``test`` per clip.
    split_column : str, default "split"
    baselines : sequence of {"mfcc", "logmel"}, default both
        Frame features computed from the same audio: 20 MFCCs with deltas, and the
        model's own log-mel frames.
    median_frames : int >= 1, default 9
        Length of the median filter over each class's frame decisions (1: none).
    segment_seconds : float > 0, default 1.0
    seed : int, default 0
    audio_root : str or Path, optional
        Where the clips' audio lives (for the baselines); default: as recorded at export.

    Returns
    -------
    DetectionResult
        ``scores[0]`` is the learned features', then one per baseline.
    """
    bad = [b for b in baselines if b not in DETECTION_BASELINES]
    if bad:
        raise ParameterError(f"baseline(s) {bad} not among {', '.join(DETECTION_BASELINES)}")
    if isinstance(median_frames, bool) or not isinstance(median_frames, int) or median_frames < 1:
        raise ParameterError(f"median_frames = {median_frames!r} must be an integer >= 1")
    if not segment_seconds > 0:
        raise ParameterError(f"segment_seconds = {segment_seconds!r} must be positive")
    clips, meta = _read_clips(dataset, split_column)
    train = [c for c in clips if c.split == "train"]
    test = [c for c in clips if c.split == "test"]
    if not train or not test:
        raise ParameterError(f"{dataset}: column {split_column!r} needs both 'train' and 'test' "
                             "clips")
    classes = sorted({label for c in clips for frame in c.labels for label in frame})
    if not classes:
        raise ParameterError(f"{dataset}: no frame carries an event label")
    n_train = sum(len(c.features) for c in train)
    step = max(1, math.ceil(n_train / MAX_TRAIN_FRAMES))
    train_y = _targets([label for c in train for label in c.labels[::step]], classes)
    def score(name: str, train_x: list[np.ndarray], test_x: list[np.ndarray]) -> DetectionScore:
        return _score(name, train_x, test_x, train_y, test, classes, median_frames=median_frames,
                      segment=segment_seconds, seed=seed)

    scores = [score(f"rbm-{meta.get('hidden', '?')}", [c.features[::step] for c in train],
                    [c.features for c in test])]
    root = str(audio_root or meta.get("audio_root", "."))
    fe = FrontEndConfig(**meta["frontend"])
    for kind in baselines:
        frames = {c.source: _baseline_frames(kind, store.join(root, c.source), fe,
                                             len(c.features))
                  for c in clips}
        scores.append(score(kind, [frames[c.source][::step] for c in train],
                            [frames[c.source] for c in test]))
    return DetectionResult(classes=classes, n_train_clips=len(train), n_test_clips=len(test),
                           n_train_frames=len(train_y), segment_seconds=segment_seconds,
                           median_frames=median_frames, scores=scores)
