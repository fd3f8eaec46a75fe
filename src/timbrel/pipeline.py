"""Reading a trained model for inference: the model with its front end and band statistics.

A model file written by :func:`timbrel.training.train` carries the configuration its
frames were made with and the training cache's per-band mean and spread, so new audio
is framed and standardised exactly as the training audio was.  Export, likelihood
scoring and pictures read models through this module, never through the trainer.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from ._errors import ModelFileError
from .config import Config
from .frontend import ContextStacker, mel_band_edges, stack_context, standardise
from .model import RBM, read_model_file

__all__ = ["FeaturePipeline", "FeatureRows", "describe_model", "describe_text", "load_pipeline"]


class FeaturePipeline:
    """A trained model with the front end and standardisation it was trained with.

    Attributes
    ----------
    rbm : RBM
    config : Config
        The configuration stored in the model file.
    band_mean, band_scale : np.ndarray, shape (n_mels,), float32
        Per-band mean and divisor of the training cache.
    checksum : str
        The model file's checksum.
    metadata : dict
        Everything else the model file's metadata holds (history, cache summary, ...).
    """

    def __init__(self, rbm: RBM, config: Config, band_mean: np.ndarray, band_scale: np.ndarray,
                 checksum: str, metadata: dict[str, Any]) -> None:
        self.rbm = rbm
        self.config = config
        self.band_mean = np.asarray(band_mean, np.float32)
        self.band_scale = np.asarray(band_scale, np.float32)
        self.checksum = checksum
        self.metadata = metadata

    @property
    def history(self) -> list[dict[str, Any]]:
        """The training history, one row per epoch (model files before the trainer kept
        one history carry it in their metadata)."""
        return list(self.metadata.get("history", self.rbm.history_))

    def standardise(self, frames: np.ndarray) -> np.ndarray:
        """Frames (n, n_mels) to standardised float32 frames, as in training."""
        return standardise(frames, self.band_mean, self.band_scale)

    def stream_features(self, frame_blocks: Iterable[np.ndarray]) -> Iterator[np.ndarray]:
        """Hidden activations of a clip given as consecutive blocks of log-mel frames.

        Rows come out as their context windows complete; the concatenation equals
        :meth:`features` of all the frames (memory stays flat in the clip's length).

        Yields
        ------
        np.ndarray, shape (k, n_hidden), float32
        """
        rows = FeatureRows(self)
        for frames in frame_blocks:
            out = rows.push(frames)
            if len(out):
                yield out
        rest = rows.finish()
        if len(rest):
            yield rest

    def features(self, frames: np.ndarray) -> np.ndarray:
        """Hidden activations of a whole clip's log-mel frames.

        Parameters
        ----------
        frames : np.ndarray, shape (n_frames, n_mels)
            Log-mel frames from :class:`timbrel.FrontEnd` with the model's settings.

        Returns
        -------
        np.ndarray, shape (n_frames, n_hidden), float32
        """
        windows = stack_context(self.standardise(frames), self.config.frontend.context)
        return self.rbm.transform(windows)


class FeatureRows:
    """Push-style features of one clip: frames in, the rows whose context is complete out.

    Parameters
    ----------
    pipe : FeaturePipeline
    """

    def __init__(self, pipe: FeaturePipeline) -> None:
        self.pipe = pipe
        self._stacker = ContextStacker(pipe.config.frontend.context)

    def _transform(self, windows: np.ndarray) -> np.ndarray:
        if len(windows) == 0:
            return np.empty((0, self.pipe.rbm.n_hidden), np.float32)
        return self.pipe.rbm.transform(windows)

    def push(self, frames: np.ndarray) -> np.ndarray:
        """Features of the frames whose context window ``frames`` completes, (k, n_hidden)."""
        return self._transform(self._stacker.push(self.pipe.standardise(frames)))

    def finish(self) -> np.ndarray:
        """Features of the clip's last ``context`` frames (the right edge repeated)."""
        return self._transform(self._stacker.finish())


def load_pipeline(path: str | Path) -> FeaturePipeline:
    """Read a model file written by :func:`timbrel.training.train`.

    Raises
    ------
    ModelFileError
        If the file is damaged, or lacks the front-end configuration or band statistics.

    Examples
    --------
    >>> pipe = load_pipeline("out/demo/model.npz")  # doctest: +SKIP
    >>> pipe.features(frames).shape  # doctest: +SKIP
    (n_frames, 1024)
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


def describe_model(path: str | Path, pipe: FeaturePipeline | None = None) -> dict[str, Any]:
    """A JSON-able summary of a model file: sizes, unit kinds, σ per band, training figures.

    σ per band is the learned visible standard deviation in standardised units (1 means the
    model explains none of the band's spread) and, multiplied by the band's training
    spread, in log-mel units.

    Parameters
    ----------
    path : str or Path
        The model file.
    pipe : FeaturePipeline, optional
        The file already loaded (default: loaded here).
    """
    pipe = load_pipeline(path) if pipe is None else pipe
    rbm, fe = pipe.rbm, pipe.config.frontend
    edges = mel_band_edges(n_mels=fe.n_mels, fmin=fe.fmin, fmax=fe.upper_frequency,
                           scale=fe.mel_scale)
    sigma = np.asarray(rbm.sigma_, np.float64).reshape(fe.n_positions, fe.n_mels)
    sigma_band = sigma.mean(axis=0)
    history = pipe.history
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


def describe_text(summary: dict[str, Any]) -> str:
    """The summary of :func:`describe_model` as lines for a person."""
    s = summary
    lay = s["layout"]
    last = s.get("last_epoch") or {}
    lines = [
        f"model      {s['path']}  (checksum {s['checksum'][:16]})",
        f"units      {s['n_visible']} {s['visible']} visible = {lay['positions']} frames x "
        f"{lay['bands']} bands (context {lay['context']}), {s['n_hidden']} {s['hidden']} hidden",
        f"training   {s['epochs']} epochs on {s['training'].get('n_train_clips', '?')} clips "
        f"({s['training'].get('n_validation_clips', '?')} held out), "
        f"{s['training'].get('n_frames', '?')} frames",
    ]
    if last:
        lines.append(f"last epoch recon {last.get('recon_error', float('nan')):.4f} train, "
                     f"{last.get('val_recon_error') or float('nan'):.4f} validation; "
                     f"free-energy gap {last.get('free_energy_gap') or float('nan'):+.3f}; "
                     f"dead units {last.get('dead_fraction', 0):.0%}")
    lines.append("sigma per band (standardised units; 1 = no spread explained):")
    for row in s["sigma_per_band"]:
        bar = "#" * max(1, round(40 * min(row["sigma"], 1.0)))
        lines.append(f"  {row['band']:3d} {row['centre_hz']:8.0f} Hz  {row['sigma']:.3f}  {bar}")
    if s.get("plots"):
        lines.append("pictures:")
        lines.extend(f"  {p}" for p in s["plots"])
    return "\n".join(lines)
