"""The standardised context windows a model sees, drawn from a frame cache.

Training, validation monitoring and likelihood scoring all read a cache through
:class:`WindowBatches`, so every stage sees exactly the windows the trainer fed the
model: the same clip split (whole clips held out), the same standardisation and the
same context stacking.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Any, Protocol

import numpy as np

from ._errors import ConfigError, ParameterError
from .cache import FrameCache
from .config import Config
from .frontend import context_rows

__all__ = ["SEGMENT_FRAMES", "Standardiser", "WindowBatches", "check_config_against_cache",
           "split_clips", "split_seed", "window_sets", "zca_whitening"]

#: Frames of one clip read at a time: bounds memory for very long clips.
SEGMENT_FRAMES = 8192


class Standardiser(Protocol):
    """Anything that standardises frames as training did: BandStats, FeaturePipeline."""

    def standardise(self, frames: np.ndarray) -> np.ndarray: ...


class WindowBatches:
    """Shuffled minibatches of standardised context windows from a set of clips."""

    def __init__(self, cache: FrameCache, clips: np.ndarray, stats: Standardiser, *, context: int,
                 batch_size: int, chunk_frames: int, max_frames: int) -> None:
        self.cache = cache
        self.clips = np.asarray(clips)
        self.stats = stats
        self.context = context
        self.batch_size = batch_size
        self.chunk_frames = chunk_frames
        self.max_frames = max_frames
        counts = cache.frame_counts
        # work items: (clip, start, stop) segments of bounded length
        self.segments = [(int(c), s, min(s + SEGMENT_FRAMES, int(counts[c])))
                         for c in clips for s in range(0, int(counts[c]), SEGMENT_FRAMES)]
        self.n_frames = int(sum(b - a for _, a, b in self.segments))

    def rows(self, clip: int, start: int, stop: int) -> np.ndarray:
        frames = self.cache.clip_frames(clip)
        lo, hi = max(0, start - self.context), min(len(frames), stop + self.context)
        piece = self.stats.standardise(frames[lo:hi])
        return context_rows(piece, start - lo, stop - lo, self.context)

    def epoch(self, rng: np.random.Generator) -> Iterator[np.ndarray]:
        order = rng.permutation(len(self.segments))
        budget = self.max_frames or self.n_frames
        pending: list[np.ndarray] = []
        n_pending = 0
        given = 0
        for i in order:
            if given >= budget:
                break
            pending.append(self.rows(*self.segments[i]))
            n_pending += len(pending[-1])
            if n_pending >= self.chunk_frames:
                for batch in self._shuffle_out(pending, rng, budget - given):
                    given += len(batch)
                    yield batch
                pending, n_pending = [], 0
        if pending and given < budget:
            yield from self._shuffle_out(pending, rng, budget - given)

    def _shuffle_out(self, pending: list[np.ndarray], rng: np.random.Generator,
                     budget: int) -> Iterator[np.ndarray]:
        block = np.concatenate(pending)
        block = block[rng.permutation(len(block))][:budget]
        for start in range(0, len(block), self.batch_size):
            yield np.ascontiguousarray(block[start:start + self.batch_size])

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Up to ``n`` rows drawn evenly from the segments (for monitoring)."""
        if not self.segments:
            return np.empty((0, (2 * self.context + 1) * self.cache.n_mels), np.float32)
        picks = []
        per = max(1, math.ceil(n / len(self.segments)))
        for clip, a, b in self.segments:
            rows = self.rows(clip, a, b)
            take = rng.choice(len(rows), size=min(per, len(rows)), replace=False)
            picks.append(rows[np.sort(take)])
        out = np.concatenate(picks)
        return out[rng.permutation(len(out))[:n]]


def split_clips(n_clips: int, fraction: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Training and validation clip indices: a seeded share of whole clips held out."""
    rng = np.random.default_rng([seed, 0x5EED])
    order = rng.permutation(n_clips)
    n_val = round(fraction * n_clips)
    if fraction > 0 and n_clips >= 2:
        n_val = max(1, min(n_val, n_clips - 1))
    else:
        n_val = 0
    return np.sort(order[n_val:]), np.sort(order[:n_val])


def split_seed(rbm: Any) -> int:
    """The seed the trainer splits clips and orders batches with: the model's, or 0."""
    seed = getattr(rbm, "seed", None)
    return int(seed) if seed is not None else 0


def window_sets(cache: FrameCache, config: Config, stats: Standardiser, *, seed: int,
                batch_size: int) -> tuple[WindowBatches, WindowBatches]:
    """The trainer's training and validation windows of a cache.

    Clips are split as :func:`train` splits them (whole clips held out, the same seed),
    and each set yields the standardised context windows training sees.

    Parameters
    ----------
    cache : FrameCache
    config : Config
        Its ``frontend.context`` and ``[training]`` table are used.
    stats : BandStats-like
        Anything with ``standardise(frames)``: the cache's band statistics when training.
    seed : int
        See :func:`split_seed`.
    batch_size : int
        Rows per minibatch of :meth:`WindowBatches.epoch`.

    Returns
    -------
    train, validation : WindowBatches
        ``clips`` holds each set's clip indices; ``rows(clip, start, stop)`` and
        ``segments`` give the windows in clip order.
    """
    train_clips, val_clips = split_clips(len(cache), config.training.validation_fraction, seed)
    if len(train_clips) == 0:
        raise ParameterError(f"{cache.path}: the cache holds no clip to train on")
    make = dict(context=config.frontend.context, batch_size=batch_size,
                chunk_frames=config.training.chunk_frames, max_frames=config.training.max_frames)
    return (WindowBatches(cache, train_clips, stats, **make),
            WindowBatches(cache, val_clips, stats, **{**make, "max_frames": 0}))


def check_config_against_cache(config: Config, cache: FrameCache) -> None:
    """Refuse a configuration whose frame settings differ from those the cache was made with.

    Raises
    ------
    ConfigError
        Naming the cache and each differing setting.
    """
    diffs = config.frontend.frame_differences(cache.config.frontend)
    if diffs:
        raise ConfigError(f"{cache.path}: the cache's frames were made with other front-end "
                          f"settings ({'; '.join(diffs)}); rebuild the cache or drop those keys")


def zca_whitening(windows: np.ndarray, epsilon: float) -> tuple[np.ndarray, np.ndarray]:
    """The ZCA whitening of a sample of windows: ``(w - mean) @ matrix`` has (nearly)
    uncorrelated unit-variance columns and stays as close to ``w`` as whitening can.

    ``matrix = U diag(1 / sqrt(λ + epsilon)) Uᵀ`` from the eigendecomposition
    ``U diag(λ) Uᵀ`` of the sample covariance (Bell & Sejnowski 1997; as used before
    feature learning by Coates, Lee & Ng 2011); ``epsilon`` keeps directions of tiny
    variance from being blown up into noise.

    Parameters
    ----------
    windows : np.ndarray, shape (n, d)
    epsilon : float > 0

    Returns
    -------
    mean : np.ndarray, shape (d,), float32
    matrix : np.ndarray, shape (d, d), float32, symmetric

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(0).standard_normal((5000, 3)) @ [[2, 1, 0], [0, 1, 0], [0, 0, 3]]
    >>> mean, matrix = zca_whitening(x, 1e-6)
    >>> np.round(np.cov(((x - mean) @ matrix).T), 2) + 0.0
    array([[1., 0., 0.],
           [0., 1., 0.],
           [0., 0., 1.]])
    """
    if not epsilon > 0:
        raise ParameterError(f"epsilon = {epsilon!r} must be positive")
    sample = np.asarray(windows, np.float64)
    if sample.ndim != 2 or len(sample) < 2:
        raise ParameterError(f"whitening needs a 2-D sample of at least 2 windows; got shape "
                             f"{sample.shape}")
    mean = sample.mean(axis=0)
    centred = sample - mean
    covariance = centred.T @ centred / (len(sample) - 1)
    values, vectors = np.linalg.eigh(covariance)
    matrix = (vectors / np.sqrt(np.maximum(values, 0.0) + epsilon)) @ vectors.T
    return mean.astype(np.float32), matrix.astype(np.float32)
