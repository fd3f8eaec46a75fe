"""Training an RBM from a frame cache: batches, monitoring, checkpoints, the model file.

The trainer streams shuffled minibatches of standardised context windows out of the
memory-mapped cache (so a cache larger than RAM trains), holds out whole clips for
validation, monitors each epoch, checkpoints atomically after every epoch, and writes
one model file that carries the front-end configuration and band statistics, so export
frames new audio exactly as the training audio was framed.
"""

from __future__ import annotations

import csv
import dataclasses
import inspect
import json
import math
import time
import warnings
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from . import __version__
from ._atomic import atomic_open, atomic_path, make_folder, remove_stale_temporaries
from ._errors import CacheError, ConfigError, ModelFileError, ParameterError, TimbrelError
from ._progress import progress_bar
from .cache import FrameCache
from .config import Config
from .frontend import context_rows
from .model import RBM, _content_digest, read_model_file

__all__ = [
    "FeaturePipeline",
    "TrainResult",
    "WindowBatches",
    "check_config_against_cache",
    "checkpoint_path",
    "history_path",
    "load_pipeline",
    "model_from_config",
    "split_seed",
    "train",
    "window_sets",
]

#: Frames drawn once from the validation clips (and from the training clips) to monitor.
MONITOR_FRAMES = 8192
#: The free-energy gap uses the first this many of them: a rectified unit's free energy
#: sums dozens of softplus terms, 40x the cost of its mean, and the gap's noise at this
#: size is far below the gaps worth reading.
FREE_ENERGY_FRAMES = 2048
#: Frames of one clip read at a time: bounds memory for very long clips.
SEGMENT_FRAMES = 8192
CHECKPOINT_FORMAT = "timbrel-checkpoint"


def history_path(model_path: str | Path) -> Path:
    """Where the per-epoch history of a model is written: ``MODEL.history.csv``."""
    model_path = Path(model_path)
    return model_path.with_name(model_path.name + ".history.csv")


def checkpoint_path(model_path: str | Path) -> Path:
    """Where the last epoch's full training state is kept: ``MODEL.checkpoint.npz``."""
    model_path = Path(model_path)
    return model_path.with_name(model_path.name + ".checkpoint.npz")


def model_from_config(config: Config, *, layout: tuple[int, int] | None = None) -> RBM:
    """An unfitted :class:`RBM` from the ``[model]`` table, checked against its signature."""
    allowed = set(inspect.signature(RBM.__init__).parameters) - {"self"}
    unknown = set(config.model) - allowed
    if unknown:
        raise ConfigError(f"unknown key(s) {sorted(unknown)} in [model]; "
                          f"allowed: {', '.join(sorted(allowed))}")
    params = dict(config.model)
    if layout is not None and "layout" in allowed:
        params["layout"] = layout
    try:
        rbm = RBM(**params)
        rbm._check_params()
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"[model]: {exc}") from None
    return rbm


@dataclasses.dataclass
class TrainResult:
    """What :func:`train` produced."""

    model_path: Path
    history_path: Path
    history: list[dict[str, Any]]
    n_train_clips: int
    n_validation_clips: int
    wall_seconds: float

    def line(self) -> str:
        """One-line summary for a person."""
        last = self.history[-1] if self.history else {}
        return (f"trained {len(self.history)} epochs on {self.n_train_clips} clips "
                f"({self.n_validation_clips} held out) in {self.wall_seconds:.1f} s; "
                f"reconstruction error {last.get('recon_error', float('nan')):.4f} train, "
                f"{last.get('val_recon_error', float('nan')):.4f} validation")


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


def _split_clips(n_clips: int, fraction: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng([seed, 0x5EED])
    order = rng.permutation(n_clips)
    n_val = round(fraction * n_clips)
    if fraction > 0 and n_clips >= 2:
        n_val = max(1, min(n_val, n_clips - 1))
    else:
        n_val = 0
    return np.sort(order[n_val:]), np.sort(order[:n_val])


def split_seed(rbm: RBM) -> int:
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
    train_clips, val_clips = _split_clips(len(cache), config.training.validation_fraction, seed)
    if len(train_clips) == 0:
        raise ParameterError(f"{cache.path}: the cache holds no clip to train on")
    make = dict(context=config.frontend.context, batch_size=batch_size,
                chunk_frames=config.training.chunk_frames, max_frames=config.training.max_frames)
    return (WindowBatches(cache, train_clips, stats, **make),
            WindowBatches(cache, val_clips, stats, **{**make, "max_frames": 0}))


def check_config_against_cache(config: Config, cache: FrameCache) -> None:
    ours, theirs = config.frontend, cache.config.frontend
    if ours.frame_key() != theirs.frame_key():
        diffs = [f"{f.name}: config {getattr(ours, f.name)!r}, cache {getattr(theirs, f.name)!r}"
                 for f in dataclasses.fields(ours)
                 if f.name != "context" and getattr(ours, f.name) != getattr(theirs, f.name)]
        raise ConfigError(f"{cache.path}: the cache's frames were made with other front-end "
                          f"settings ({'; '.join(diffs)}); rebuild the cache or drop those keys")


def train(
    cache_path: str | Path,
    out: str | Path,
    *,
    config: Config | None = None,
    resume: bool = False,
    progress: bool = False,
    log: Callable[[str], None] | None = None,
) -> TrainResult:
    """Fit an RBM on a frame cache and write the model file.

    Parameters
    ----------
    cache_path : str or Path
        A complete frame cache (see :func:`timbrel.cache.build_cache`).
    out : str or Path
        Model file to write (``.npz``). Beside it: ``OUT.history.csv`` (one row per
        epoch) and ``OUT.checkpoint.npz`` (the full training state after the last epoch).
    config : Config, optional
        Model and training settings; its front-end frame settings must match the
        cache's (only ``context`` may differ). Default: the cache's own configuration.
    resume : bool, default False
        Continue from ``OUT.checkpoint.npz``. A resumed run ends with the same
        parameters as an uninterrupted one with the same data, config and seed.
    progress : bool, default False
        Show a live progress display with the epoch's figures.
    log : callable, optional
        Receives one line per notable event (roll-backs, resume); default: none.

    Returns
    -------
    TrainResult

    Raises
    ------
    CacheError, ConfigError, DivergenceError, ModelFileError
    """
    t0 = time.perf_counter()
    say = log or (lambda text: None)
    out = Path(out)
    if out.is_dir():
        raise ParameterError(f"{out}: the model path is a folder; give a file name")
    make_folder(out.parent)
    # a run killed while writing left its temporaries; only our own names are touched
    remove_stale_temporaries(out.parent, names=[out.name, history_path(out).name,
                                                checkpoint_path(out).name])
    cache = FrameCache.open(cache_path)
    if config is None:
        config = cache.config
    check_config_against_cache(config, cache)
    fe = dataclasses.replace(cache.config.frontend, context=config.frontend.context)
    config = dataclasses.replace(config, frontend=fe)
    stats = cache.band_stats
    constant = np.flatnonzero(stats.std <= stats.std_floor)
    if len(constant) == fe.n_mels:
        raise CacheError(f"{cache.path}: every mel band is constant over all {cache.n_frames} "
                         f"frames (spread <= {stats.std_floor:g}), so there is nothing to learn; "
                         "is the audio silence or one steady sound?")
    if len(constant):
        say(f"{len(constant)} of {fe.n_mels} mel bands are constant over the whole cache "
            f"(bands {_ranges(constant)}); they are centred but not scaled, and carry no "
            "information")
    layout = (fe.n_positions, fe.n_mels)
    rbm = model_from_config(config, layout=layout)
    seed = split_seed(rbm)
    train_batches, val_batches = window_sets(cache, config, stats, seed=seed,
                                             batch_size=rbm.batch_size)
    train_clips, val_clips = train_batches.clips, val_batches.clips
    monitor_rng = np.random.default_rng([seed, 0x3017])
    train_probe = train_batches.sample(MONITOR_FRAMES, monitor_rng)
    val_probe = val_batches.sample(MONITOR_FRAMES, monitor_rng)

    history: list[dict[str, Any]] = []
    start_epoch = 0
    ckpt = checkpoint_path(out)
    if resume and ckpt.is_file():
        start_epoch, history = _load_checkpoint(ckpt, rbm, config)
        say(f"resumed from {ckpt} after epoch {start_epoch}")
    elif resume:
        say(f"no checkpoint at {ckpt}; starting from scratch")
    if start_epoch == 0:
        rbm.initialize(fe.n_visible)

    n_epochs = rbm.epochs
    n_batches = math.ceil(min(train_batches.n_frames, config.training.max_frames or 10**18)
                          / rbm.batch_size)
    with progress_bar(progress) as bar:
        epoch_task = bar.add_task("epochs", total=n_epochs, info="")
        batch_task = bar.add_task("batches", total=n_batches, info="")
        bar.advance(epoch_task, start_epoch)
        for epoch in range(start_epoch, n_epochs):
            epoch_rng = np.random.default_rng([seed, epoch])

            def make_batches(epoch_rng_state: Mapping[str, Any] = epoch_rng.bit_generator.state
                             ) -> Iterator:
                rng = np.random.default_rng()
                rng.bit_generator.state = epoch_rng_state
                bar.update(batch_task, completed=0)
                for batch in train_batches.epoch(rng):
                    yield batch
                    bar.advance(batch_task)

            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                figures = dict(rbm.fit_epoch(make_batches, epoch=epoch))
            for w in caught:
                say(f"epoch {epoch + 1}: {w.message}")
            figures.update(_monitor(rbm, train_probe, val_probe))
            bounds = _variance_bounds(rbm)
            if bounds and bounds != _variance_bounds_of(history):
                say(f"epoch {epoch + 1}: sigma held at the floor {rbm.sigma_floor:g} for "
                    f"{bounds['sigma_at_floor']} and at the ceiling {rbm.sigma_ceiling:g} for "
                    f"{bounds['sigma_at_ceiling']} of {rbm.n_features_in_} visible units")
            figures.update(bounds)
            figures["epoch"] = epoch + 1
            figures["seconds"] = round(time.perf_counter() - t0, 3)
            history.append(_jsonable(figures))
            _save_checkpoint(ckpt, rbm, config, epoch + 1, history)
            _write_history(history_path(out), history)
            bar.advance(epoch_task)
            bar.update(epoch_task, info=_epoch_line(figures))

    metadata = {
        "timbrel": __version__,
        "config": config.to_dict(),
        "layout": list(layout),
        "history": history[-50:],
        "cache": {"path": str(Path(cache_path).absolute()), "n_clips": len(cache),
                  "n_frames": cache.n_frames, "n_train_clips": len(train_clips),
                  "n_validation_clips": len(val_clips),
                  "audio_seconds": cache.marker.get("audio_seconds")},
        "band_stats": stats.to_dict(),
    }
    rbm.save(out, metadata=metadata,
             arrays={"band_mean": stats.mean.astype(np.float64),
                     "band_scale": stats.scale.astype(np.float64)})
    return TrainResult(model_path=out, history_path=history_path(out), history=history,
                       n_train_clips=len(train_clips), n_validation_clips=len(val_clips),
                       wall_seconds=time.perf_counter() - t0)


def _ranges(indices: np.ndarray) -> str:
    """``[0, 1, 2, 5]`` as ``"0-2, 5"``."""
    parts: list[str] = []
    start = prev = int(indices[0])
    for i in [*map(int, indices[1:]), None]:
        if i is not None and i == prev + 1:
            prev = i
            continue
        parts.append(f"{start}-{prev}" if prev > start else f"{start}")
        if i is not None:
            start = prev = i
    return ", ".join(parts)


def _variance_bounds(rbm: RBM) -> dict[str, int]:
    """How many visible σ the floor and ceiling hold (Gaussian visibles with learned σ)."""
    if rbm.visible != "gaussian" or not rbm.learn_variance:
        return {}
    sigma = np.asarray(rbm.sigma_, np.float64)
    # σ = exp(z / 2) with z clipped to [2 log floor, 2 log ceiling]; allow float32 rounding
    return {"sigma_at_floor": int(np.sum(sigma <= rbm.sigma_floor * (1 + 1e-5))),
            "sigma_at_ceiling": int(np.sum(sigma >= rbm.sigma_ceiling * (1 - 1e-5)))}


def _variance_bounds_of(history: list[dict[str, Any]]) -> dict[str, int]:
    last = history[-1] if history else {}
    return {k: last[k] for k in ("sigma_at_floor", "sigma_at_ceiling") if k in last} or \
        {"sigma_at_floor": 0, "sigma_at_ceiling": 0}


def _epoch_line(f: dict[str, Any]) -> str:
    return (f"recon {f.get('recon_error', float('nan')):.3f}/"
            f"{f.get('val_recon_error', float('nan')):.3f} "
            f"FE gap {f.get('free_energy_gap', float('nan')):+.2f} "
            f"active {f.get('mean_hidden_activity', float('nan')):.3f} "
            f"dead {f.get('dead_fraction', float('nan')):.0%} "
            f"sigma {f.get('sigma_min', float('nan')):.2f}-{f.get('sigma_max', float('nan')):.2f}"
            + (f" limited {f['limited_steps']}" if f.get("limited_steps") else ""))


def _monitor(rbm: RBM, train_probe: np.ndarray, val_probe: np.ndarray) -> dict[str, float]:
    figures: dict[str, float] = {}
    if len(train_probe):
        figures["train_probe_recon_error"] = float(rbm.reconstruction_error(train_probe))
        f_train = float(np.mean(rbm.free_energy(train_probe[:FREE_ENERGY_FRAMES])))
        figures["train_free_energy"] = f_train
    if len(val_probe):
        figures["val_recon_error"] = float(rbm.reconstruction_error(val_probe))
        f_val = float(np.mean(rbm.free_energy(val_probe[:FREE_ENERGY_FRAMES])))
        figures["val_free_energy"] = f_val
        if len(train_probe):
            # validation minus training: growing means the model is over-fitting
            figures["free_energy_gap"] = f_val - figures["train_free_energy"]
    return figures


def _jsonable(d: dict[str, Any]) -> dict[str, Any]:
    out = {}
    for k, v in d.items():
        if isinstance(v, np.generic):
            v = v.item()
        if isinstance(v, float) and not math.isfinite(v):
            v = None
        out[k] = v
    return out


def _write_history(path: Path, history: list[dict[str, Any]]) -> None:
    keys: list[str] = []
    for row in history:
        keys.extend(k for k in row if k not in keys)
    with atomic_open(path, "w", encoding="utf-8", newline="") as fh:
        # csv quotes the fields that hold commas (roll-back reasons) so columns stay aligned
        writer = csv.writer(fh)
        writer.writerow(keys)
        for row in history:
            writer.writerow(["" if row.get(k) is None else str(row.get(k)) for k in keys])


def _save_checkpoint(path: Path, rbm: RBM, config: Config, epoch: int,
                     history: list[dict[str, Any]]) -> None:
    state = rbm.get_state()
    arrays = {f"state/{k}": np.asarray(v) for k, v in state.items() if isinstance(v, np.ndarray)}
    plain = {k: v for k, v in state.items() if not isinstance(v, np.ndarray)}
    header = {"format": CHECKPOINT_FORMAT, "epoch": epoch, "config": config.to_dict(),
              "state": plain, "history": history}
    arrays["header"] = np.frombuffer(json.dumps(header, default=_json_default).encode(), np.uint8)
    # SHA-256 over every member, as in model files: a damaged checkpoint must not resume
    arrays["checksum"] = np.frombuffer(_checkpoint_digest(arrays).encode(), np.uint8)
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, **arrays)  # type: ignore[arg-type]  # numpy's stub reads ** as flags


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"cannot store {type(obj).__name__} in a checkpoint")


def _checkpoint_digest(arrays: dict[str, np.ndarray]) -> str:
    return _content_digest(sorted((k, v) for k, v in arrays.items() if k != "checksum"), {})


def _load_checkpoint(path: Path, rbm: RBM, config: Config) -> tuple[int, list[dict[str, Any]]]:
    start_over = "start over without --resume"
    try:
        with np.load(path, allow_pickle=False) as data:
            members = {k: data[k] for k in data.files}
    except Exception as exc:  # any parser error of this file means damage
        raise ModelFileError(f"{path}: unreadable checkpoint ({type(exc).__name__}: {exc}); "
                             f"{start_over}") from None
    stated = members.get("checksum")
    if stated is None or stated.dtype != np.uint8 or \
            stated.tobytes() != _checkpoint_digest(members).encode():
        raise ModelFileError(f"{path}: checkpoint damaged (checksum missing or wrong); "
                             f"{start_over}")
    try:
        header = json.loads(members["header"].tobytes().decode())
        arrays = {k.split("/", 1)[1]: v for k, v in members.items() if k.startswith("state/")}
        if header.get("format") != CHECKPOINT_FORMAT:
            raise ModelFileError(f"{path}: not a timbrel checkpoint")
        saved = Config.from_dict(header["config"]).to_dict()
    except (KeyError, ValueError, AttributeError) as exc:
        raise ModelFileError(f"{path}: unusable checkpoint ({exc}); {start_over}") from None
    wanted = config.to_dict()
    # the number of epochs is the one setting a resume may change (to train longer)
    saved["model"].pop("epochs", None)
    wanted["model"].pop("epochs", None)
    if saved != wanted:
        raise ConfigError(f"{path}: the checkpoint was made with another configuration; "
                          f"resume with the same settings or {start_over}")
    try:
        rbm.set_state({**header["state"], **arrays})
        return int(header["epoch"]), list(header["history"])
    except (TimbrelError, KeyError, ValueError, TypeError) as exc:
        raise ModelFileError(f"{path}: unusable checkpoint state ({exc}); {start_over}"
                             ) from None


class FeaturePipeline:
    """A trained model with the front end and standardisation it was trained with.

    Attributes
    ----------
    rbm : RBM
    config : Config
        The configuration stored in the model file.
    stats : BandStats-like
        ``mean`` and ``scale`` per band, from the training cache.
    checksum : str
        The model file's checksum.
    """

    def __init__(self, rbm: RBM, config: Config, band_mean: np.ndarray, band_scale: np.ndarray,
                 checksum: str, metadata: dict[str, Any]) -> None:
        self.rbm = rbm
        self.config = config
        self.band_mean = np.asarray(band_mean, np.float32)
        self.band_scale = np.asarray(band_scale, np.float32)
        self.checksum = checksum
        self.metadata = metadata

    def standardise(self, frames: np.ndarray) -> np.ndarray:
        """Frames (n, n_mels) to standardised float32 frames, as in training."""
        out = np.asarray(frames, np.float32) - self.band_mean
        out /= self.band_scale
        return out

    def features(self, frames: np.ndarray) -> np.ndarray:
        """Hidden activations of a whole clip's log-mel frames, shape (n_frames, n_hidden)."""
        from .frontend import stack_context

        windows = stack_context(self.standardise(frames), self.config.frontend.context)
        return self.rbm.transform(windows)


def load_pipeline(path: str | Path) -> FeaturePipeline:
    """Read a model file written by :func:`train`.

    Raises
    ------
    ModelFileError
        If the file is damaged, or lacks the front-end configuration or band statistics.
    """
    model = read_model_file(path)
    meta = dict(model.metadata)
    try:
        config = Config.from_dict(meta["config"], source=str(path))
        band_mean = model.arrays["band_mean"]
        band_scale = model.arrays["band_scale"]
    except KeyError as exc:
        raise ModelFileError(f"{path}: not a trained timbrel pipeline (missing {exc})") from None
    if band_mean.shape != (config.frontend.n_mels,) or band_scale.shape != band_mean.shape:
        raise ModelFileError(f"{path}: band statistics do not match {config.frontend.n_mels} bands")
    if model.rbm.n_features_in_ != config.frontend.n_visible:
        raise ModelFileError(f"{path}: model has {model.rbm.n_features_in_} visible units but its "
                             f"front end gives {config.frontend.n_visible}")
    return FeaturePipeline(model.rbm, config, band_mean, band_scale, model.checksum, meta)


def describe_model(path: str | Path) -> dict[str, Any]:
    """A JSON-able summary of a model file: sizes, unit kinds, σ per band, training figures.

    σ per band is the learned visible standard deviation in standardised units (1 means the
    model explains none of the band's spread) and, multiplied by the band's training
    spread, in log-mel units.
    """
    pipe = load_pipeline(path)
    rbm, fe = pipe.rbm, pipe.config.frontend
    from .frontend import hz_to_mel, mel_to_hz

    edges = mel_to_hz(np.linspace(hz_to_mel(fe.fmin, scale=fe.mel_scale),
                                  hz_to_mel(fe.upper_frequency, scale=fe.mel_scale),
                                  fe.n_mels + 2), scale=fe.mel_scale)
    sigma = np.asarray(rbm.sigma_, np.float64).reshape(fe.n_positions, fe.n_mels)
    sigma_band = sigma.mean(axis=0)
    history = list(pipe.metadata.get("history", []))
    last = history[-1] if history else {}
    weights = np.asarray(rbm.weights_)
    return {
        "path": str(path),
        "checksum": pipe.checksum,
        "timbrel": pipe.metadata.get("timbrel"),
        "n_visible": int(weights.shape[0]),
        "n_hidden": int(weights.shape[1]),
        "hidden": rbm.hidden,
        "visible": rbm.visible,
        "layout": {"context": fe.context, "positions": fe.n_positions, "bands": fe.n_mels},
        "frontend": dataclasses.asdict(fe),
        "model": rbm.get_params(),
        "training": pipe.metadata.get("cache", {}),
        "epochs": len(history),
        "last_epoch": last,
        "sigma_per_band": [
            {"band": b, "centre_hz": round(float(edges[b + 1]), 1),
             "sigma": round(float(sigma_band[b]), 4),
             "sigma_logmel": round(float(sigma_band[b] * pipe.band_scale[b]), 4)}
            for b in range(fe.n_mels)],
        "weight_norm_range": [float(np.linalg.norm(weights, axis=0).min()),
                              float(np.linalg.norm(weights, axis=0).max())],
    }
