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
import hashlib
import json
import math
import os
import posixpath
import shutil
import time
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from . import __version__, store
from ._atomic import atomic_open, make_folder, remove_stale_temporaries
from ._errors import CacheError, ConfigError, ModelFileError, ParameterError, TimbrelError
from ._progress import progress_bar
from .cache import FrameCache
from .config import Config
from .frontend import BandStats, standardise
from .model import CONSTRAINTS, RBM, read_checkpoint, write_checkpoint
from .pipeline import FeaturePipeline, contrast_normalise, layer_arrays, load_pipeline, whiten
from .windows import (
    Standardiser,
    WindowBatches,
    check_config_against_cache,
    split_seed,
    window_sets,
    zca_whitening,
)

__all__ = [
    "TrainResult",
    "checkpoint_path",
    "history_path",
    "model_from_config",
    "train",
]

#: Frames drawn once from the validation clips (and from the training clips) to monitor.
MONITOR_FRAMES = 8192
#: The free-energy gap uses the first this many of them: a rectified unit's free energy
#: sums dozens of softplus terms, 40x the cost of its mean, and the gap's noise at this
#: size is far below the gaps worth reading.
FREE_ENERGY_FRAMES = 2048


def history_path(model_path: str | Path) -> Path:
    """Where the per-epoch history of a model is written: ``MODEL.history.csv``."""
    model_path = Path(model_path)
    return model_path.with_name(model_path.name + ".history.csv")


def checkpoint_path(model_path: str | Path) -> Path:
    """Where the last epoch's full training state is kept: ``MODEL.checkpoint.npz``."""
    model_path = Path(model_path)
    return model_path.with_name(model_path.name + ".checkpoint.npz")


def model_from_config(config: Config, *, layout: tuple[int, int] | None = None) -> RBM:
    """An unfitted :class:`RBM` from the ``[model]`` table, checked against the model's
    own table of hyperparameters (:data:`timbrel.model.CONSTRAINTS`)."""
    unknown = set(config.model) - set(CONSTRAINTS)
    if unknown:
        raise ConfigError(f"unknown key(s) {sorted(unknown)} in [model]; "
                          f"allowed: {', '.join(sorted(CONSTRAINTS))}")
    params = dict(config.model)
    if layout is not None:
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

    model_path: Path | str
    history_path: Path | str
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


def train(
    cache_path: str | Path,
    out: str | Path,
    *,
    config: Config | None = None,
    overrides: Iterable[str] = (),
    model: Mapping[str, Any] | None = None,
    on: str | Path | None = None,
    resume: bool = False,
    progress: bool = False,
    log: Callable[[str], None] | None = None,
) -> TrainResult:
    """Fit an RBM on a frame cache and write the model file.

    Parameters
    ----------
    cache_path : str or Path
        A complete frame cache (see :func:`timbrel.cache.build_cache`), local or a URL
        (a cache in a store is streamed by byte range, see :class:`timbrel.cache.FrameCache`).
    out : str or Path
        Model file to write (``.npz``). Beside it: ``OUT.history.csv`` (one row per
        epoch) and ``OUT.checkpoint.npz`` (the full training state after the last epoch).
        For a URL (``s3://...``) the three are written to a local staging folder (see
        :func:`staging_path`) while training, and the history, then the model, are
        uploaded at the end; ``resume`` continues from the staged checkpoint.
    config : Config, optional
        Model and training settings; its front-end frame settings must match the
        cache's (only ``context`` may differ). Default: the cache's own configuration.
    overrides : iterable of str, default ()
        ``table.key=value`` changes applied to that configuration (see
        :func:`timbrel.config.load_config`).
    model : mapping, optional
        ``[model]`` keys set last, e.g. ``{"n_hidden": 512, "seed": 0}``.
    on : str or Path, optional
        A trained model file to stack this model on: the new layer learns from the
        features that model gives of the cache's windows (its front end, context and
        whitening are used, each feature standardised over the training windows), and the written
        file holds every layer (``timbrel export --layer`` chooses which to export).
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
    if store.is_url(out):
        return _train_to_store(cache_path, str(out), config=config, overrides=overrides,
                               model=model, on=on, resume=resume, progress=progress, log=log)
    t0 = time.perf_counter()
    say = log or (lambda text: None)
    out = _prepare_output(Path(out))
    below = load_pipeline(on) if on is not None else None
    cache, config = _open_cache(cache_path, config, overrides, model or {}, say, below)
    fe = config.frontend
    stats: Standardiser = cache.band_stats if below is None else below
    band_mean, band_scale = ((cache.band_stats.mean, cache.band_stats.scale) if below is None
                             else (below.band_mean, below.band_scale))
    arrays: dict[str, np.ndarray] = {"band_mean": np.asarray(band_mean, np.float64),
                                     "band_scale": np.asarray(band_scale, np.float64)}
    rbm = model_from_config(config, layout=None if below else (fe.n_positions, fe.n_mels))
    seed = split_seed(rbm)
    windows = window_sets(cache, config, stats, seed=seed, batch_size=rbm.batch_size)
    train_batches: _Batches = windows[0]
    val_batches: _Batches = windows[1]
    stack: list[dict[str, Any]] = []
    n_visible = fe.n_visible
    if below is not None:
        mean, scale, fn = _layer_input(below, windows[0], seed)
        stack, lower = layer_arrays(below)
        arrays.update(lower, input_mean=mean, input_scale=scale)
        n_visible = below.n_features("top")
    else:
        if config.training.window_contrast:
            train_batches = _Mapped(windows[0], contrast_normalise)
            val_batches = _Mapped(windows[1], contrast_normalise)
        if config.training.whiten == "zca":
            mean, matrix, fn = _whitening(train_batches, config.training.whiten_epsilon, seed)
            arrays.update(whiten_mean=mean, whiten_matrix=matrix)
    if below is not None or config.training.whiten != "none":
        train_batches, val_batches = _Mapped(train_batches, fn), _Mapped(val_batches, fn)
    start_epoch = _start(rbm, checkpoint_path(out), config, n_visible, resume=resume, say=say)
    epochs = _Epochs(rbm, config, train_batches, val_batches, seed=seed, out=out, say=say,
                     began=t0)
    epochs.run(start_epoch, progress=progress)
    metadata = _metadata(config, cache, cache_path, train_batches, val_batches)
    if below is not None:
        metadata.update(stack=stack, band_stats=below.metadata.get("band_stats"))
    rbm.save(out, metadata=metadata, arrays=arrays)
    return TrainResult(model_path=out, history_path=history_path(out), history=rbm.history_,
                       n_train_clips=len(train_batches.clips),
                       n_validation_clips=len(val_batches.clips),
                       wall_seconds=time.perf_counter() - t0)


def staging_path(url: str) -> Path:
    """The local file a model bound for ``url`` is trained into:
    ``$TIMBREL_STAGING`` (default ``~/.cache/timbrel/staging``)/<hash of the URL>/<name>."""
    root = Path(os.environ.get("TIMBREL_STAGING", "~/.cache/timbrel/staging")).expanduser()
    digest = hashlib.sha256(url.encode("utf-8")).hexdigest()[:16]
    return root / digest / posixpath.basename(url.rstrip("/"))


def _train_to_store(cache_path: str | Path, url: str, **options: Any) -> TrainResult:
    """:func:`train` into a staging file, then the history and the model uploaded (the
    model last: a model in the store is always complete)."""
    store.folder(store.parent(url)).prepare()
    local = staging_path(url)
    result = train(cache_path, local, **options)
    for name in (history_path(local).name, local.name):
        with store.writing_file(store.join(store.parent(url), name)) as tmp:
            shutil.copyfile(local.parent / name, tmp)
    return dataclasses.replace(result, model_path=url,
                               history_path=store.join(store.parent(url),
                                                       history_path(local).name))


class _Batches(Protocol):
    """What the training loop reads: shuffled minibatches, samples, clip and frame counts."""

    clips: np.ndarray
    n_frames: int

    def epoch(self, rng: np.random.Generator) -> Iterator[np.ndarray]: ...

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray: ...


class _Mapped:
    """Minibatches and samples of windows, each passed through ``fn`` on the way out."""

    def __init__(self, windows: _Batches, fn: Callable[[np.ndarray], np.ndarray]) -> None:
        self.windows, self.fn = windows, fn
        self.clips, self.n_frames = windows.clips, windows.n_frames

    def epoch(self, rng: np.random.Generator) -> Iterator[np.ndarray]:
        for batch in self.windows.epoch(rng):
            yield self.fn(batch)

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        return self.fn(self.windows.sample(n, rng))


#: Training windows drawn (at most) for a stacked layer's input statistics and for the
#: whitening matrix.
STATISTICS_FRAMES = 32768


def _layer_input(below: FeaturePipeline, train: WindowBatches, seed: int
                 ) -> tuple[np.ndarray, np.ndarray, Callable[[np.ndarray], np.ndarray]]:
    """Mean and scale of the lower layers' features over training windows, and the map
    from windows to the standardised features a stacked layer learns from."""
    sample = below.transform_windows(train.sample(STATISTICS_FRAMES,
                                                  np.random.default_rng([seed, 0x57AC])))
    mean = sample.mean(axis=0, dtype=np.float64).astype(np.float32)
    std = sample.std(axis=0, dtype=np.float64)
    scale = np.where(std > 1e-6, std, 1.0).astype(np.float32)
    return mean, scale, lambda w: standardise(below.transform_windows(w), mean, scale)


def _whitening(train: _Batches, epsilon: float, seed: int
               ) -> tuple[np.ndarray, np.ndarray, Callable[[np.ndarray], np.ndarray]]:
    """ZCA whitening of the training windows and the map that applies it.

    The matrix is scaled so that the whitened windows have unit variance on average: a
    large ``epsilon`` (a partial whitening) would otherwise shrink them far below the
    Gaussian units' starting σ of 1, which the slow variance steps take many epochs to
    follow."""
    sample = train.sample(STATISTICS_FRAMES, np.random.default_rng([seed, 0x2CA]))
    mean, matrix = zca_whitening(sample, epsilon)
    spread = float(np.sqrt(np.mean(np.square(whiten(sample, mean, matrix), dtype=np.float64))))
    matrix = (matrix / max(spread, 1e-12)).astype(np.float32)
    return mean, matrix, lambda w: whiten(w, mean, matrix)


def _prepare_output(out: Path) -> Path:
    if out.is_dir():
        raise ParameterError(f"{out}: the model path is a folder; give a file name")
    make_folder(out.parent)
    # a run killed while writing left its temporaries; only our own names are touched
    remove_stale_temporaries(out.parent, names=[out.name, history_path(out).name,
                                                checkpoint_path(out).name])
    return out


def _open_cache(cache_path: str | Path, config: Config | None, overrides: Iterable[str],
                model: Mapping[str, Any], say: Callable[[str], None],
                below: FeaturePipeline | None) -> tuple[FrameCache, Config]:
    """The cache, and the configuration with the cache's own frame settings (or, for a
    layer stacked on another model, that model's front end, context included)."""
    cache = FrameCache.open(cache_path)
    config = (cache.config if config is None else config).with_overrides(overrides)
    if model:
        config = dataclasses.replace(config, model={**config.model, **model})
    if below is not None:  # the lower layers' front end, context and whitening
        training = dataclasses.replace(config.training, whiten=below.config.training.whiten,
                                       window_contrast=below.config.training.window_contrast,
                                       whiten_epsilon=below.config.training.whiten_epsilon)
        config = dataclasses.replace(config, frontend=below.config.frontend, training=training)
    check_config_against_cache(config, cache)
    fe = dataclasses.replace(cache.config.frontend, context=config.frontend.context)
    _check_bands(cache, cache.band_stats, fe.n_mels, say)
    return cache, dataclasses.replace(config, frontend=fe)


def _check_bands(cache: FrameCache, stats: BandStats, n_mels: int,
                 say: Callable[[str], None]) -> None:
    constant = np.flatnonzero(stats.std <= stats.std_floor)
    if len(constant) == n_mels:
        raise CacheError(f"{cache.path}: every mel band is constant over all {cache.n_frames} "
                         f"frames (spread <= {stats.std_floor:g}), so there is nothing to learn; "
                         "is the audio silence or one steady sound?")
    if len(constant):
        say(f"{len(constant)} of {n_mels} mel bands are constant over the whole cache "
            f"(bands {_ranges(constant)}); they are centred but not scaled, and carry no "
            "information")


def _start(rbm: RBM, ckpt: Path, config: Config, n_visible: int, *, resume: bool,
           say: Callable[[str], None]) -> int:
    """The epoch to start from: after the checkpoint's with ``resume``, else 0 (fresh)."""
    start_epoch = 0
    if resume and ckpt.is_file():
        start_epoch = _load_checkpoint(ckpt, rbm, config)
        say(f"resumed from {ckpt} after epoch {start_epoch}")
    elif resume:
        say(f"no checkpoint at {ckpt}; starting from scratch")
    if start_epoch == 0:
        rbm.initialize(n_visible)
    return start_epoch


class _Epochs:
    """The training loop: one guarded epoch, its monitoring, the checkpoint and history."""

    def __init__(self, rbm: RBM, config: Config, train_batches: _Batches,
                 val_batches: _Batches, *, seed: int, out: Path,
                 say: Callable[[str], None], began: float) -> None:
        self.rbm, self.config, self.train_batches = rbm, config, train_batches
        self.seed, self.out, self.say, self.began = seed, out, say, began
        monitor_rng = np.random.default_rng([seed, 0x3017])
        self.train_probe = train_batches.sample(MONITOR_FRAMES, monitor_rng)
        self.val_probe = val_batches.sample(MONITOR_FRAMES, monitor_rng)

    def run(self, start_epoch: int, *, progress: bool) -> None:
        rbm = self.rbm
        max_frames = self.config.training.max_frames or 10**18
        n_batches = math.ceil(min(self.train_batches.n_frames, max_frames) / rbm.batch_size)
        with progress_bar(progress) as bar:
            epoch_task = bar.add_task("epochs", total=rbm.epochs, info="")
            batch_task = bar.add_task("batches", total=n_batches, info="")
            bar.advance(epoch_task, start_epoch)
            for epoch in range(start_epoch, rbm.epochs):
                figures = self.epoch(epoch, lambda: bar.update(batch_task, completed=0),
                                     lambda: bar.advance(batch_task))
                bar.advance(epoch_task)
                bar.update(epoch_task, info=_epoch_line(figures))

    def epoch(self, epoch: int, on_start: Callable[[], None], on_batch: Callable[[], None]
              ) -> dict[str, Any]:
        """Train epoch ``epoch`` (from 0), monitor it, checkpoint; return its history row."""
        rbm = self.rbm
        epoch_rng = np.random.default_rng([self.seed, epoch])

        def make_batches(state: Mapping[str, Any] = epoch_rng.bit_generator.state) -> Iterator:
            rng = np.random.default_rng()
            rng.bit_generator.state = state
            on_start()
            for batch in self.train_batches.epoch(rng):
                yield batch
                on_batch()

        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            figures = dict(rbm.fit_epoch(make_batches, epoch=epoch))
        for w in caught:
            self.say(f"epoch {epoch + 1}: {w.message}")
        figures.update(_monitor(rbm, self.train_probe, self.val_probe))
        bounds = _variance_bounds(rbm)
        if bounds and bounds != _variance_bounds_of(rbm.history_[:-1]):
            self.say(f"epoch {epoch + 1}: sigma held at the floor {rbm.sigma_floor:g} for "
                     f"{bounds['sigma_at_floor']} and at the ceiling {rbm.sigma_ceiling:g} "
                     f"for {bounds['sigma_at_ceiling']} of {rbm.n_features_in_} visible units")
        figures.update(bounds)
        figures["elapsed_seconds"] = round(time.perf_counter() - self.began, 3)
        # one history: the estimator's row for this epoch, with the trainer's figures added
        rbm.history_[-1] = _jsonable(figures)
        _save_checkpoint(checkpoint_path(self.out), rbm, self.config, epoch + 1)
        _write_history(history_path(self.out), rbm.history_)
        return figures


def _metadata(config: Config, cache: FrameCache, cache_path: str | Path,
              train_batches: _Batches, val_batches: _Batches) -> dict[str, Any]:
    """What the model file records besides the model: config, cache summary, band stats."""
    fe = config.frontend
    return {
        "timbrel": __version__,
        "config": config.to_dict(),
        "layout": [fe.n_positions, fe.n_mels],
        "cache": {"path": store.absolute(cache_path), "n_clips": len(cache),
                  "n_frames": cache.n_frames, "n_train_clips": len(train_batches.clips),
                  "n_validation_clips": len(val_batches.clips),
                  "audio_seconds": cache.marker.get("audio_seconds")},
        "band_stats": cache.band_stats.to_dict(),
    }


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


def _save_checkpoint(path: Path, rbm: RBM, config: Config, epoch: int) -> None:
    write_checkpoint(path, rbm.get_state(), {"epoch": epoch, "config": config.to_dict()})


def _differences(saved: Mapping[str, Any], wanted: Mapping[str, Any], most: int = 4) -> str:
    """``table.key=VALUE there, VALUE now`` for each setting that differs (values as
    ``--set`` takes them, in TOML), the first ``most`` of them."""
    lines = []
    for table in sorted(set(saved) | set(wanted)):
        a, b = saved.get(table, {}), wanted.get(table, {})
        for key in sorted(set(a) | set(b)):
            if a.get(key) != b.get(key):
                there, now = (json.dumps(d[key]) if key in d else "unset" for d in (a, b))
                lines.append(f"{table}.{key}={there} there, {now} now")
    more = f", and {len(lines) - most} more" if len(lines) > most else ""
    return "; ".join(lines[:most]) + more


def _load_checkpoint(path: Path, rbm: RBM, config: Config) -> int:
    """Restore the training state of a checkpoint into ``rbm``; return its epoch."""
    start_over = "start over without --resume"
    header, state = read_checkpoint(path, advice=start_over)
    try:
        saved = Config.from_stored(header["config"], source=str(path)).to_dict()
    except (KeyError, ValueError, AttributeError, TypeError) as exc:
        raise ModelFileError(f"{path}: unusable checkpoint ({exc}); {start_over}") from None
    wanted = config.to_dict()
    # the number of epochs is the one setting a resume may change (to train longer)
    saved["model"].pop("epochs", None)
    wanted["model"].pop("epochs", None)
    if saved != wanted:
        raise ConfigError(f"{path}: the checkpoint was made with another configuration "
                          f"({_differences(saved, wanted)}); resume with the same settings "
                          f"or {start_over}")
    try:
        rbm.set_state(state)
        if "history" in header:  # written before the trainer kept one history
            rbm.history_ = list(header["history"])
        return int(header["epoch"])
    except (TimbrelError, KeyError, ValueError, TypeError) as exc:
        raise ModelFileError(f"{path}: unusable checkpoint state ({exc}); {start_over}"
                             ) from None
