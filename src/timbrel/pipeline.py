"""Reading a trained model for inference: the model with its front end and band statistics.

A model file written by :func:`timbrel.training.train` carries the configuration its
frames were made with and the training cache's per-band mean and spread, so new audio
is framed and standardised exactly as the training audio was.  Export, likelihood
scoring and pictures read models through this module, never through the trainer.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ._errors import ModelFileError, ParameterError
from .config import Config
from .frontend import ContextStacker, mel_band_edges, stack_context, standardise
from .model import RBM, ModelFile, rbm_from_parameters, read_model_file
from .model._files import PARAM_ARRAYS

__all__ = ["LAYERS", "FeaturePipeline", "FeatureRows", "Layer", "contrast_normalise",
           "describe_model", "describe_text", "layer_arrays", "load_pipeline", "whiten"]


#: Which features a stacked pipeline gives: the top layer's, the first layer's (over the
#: context windows), or every layer's side by side.
LAYERS = ("top", "first", "all")


@dataclasses.dataclass(frozen=True)
class Layer:
    """A layer stacked on the one below: its RBM and how it standardises its input."""

    rbm: RBM
    input_mean: np.ndarray   # (n_visible,) float32
    input_scale: np.ndarray  # (n_visible,) float32

    def transform(self, below: np.ndarray) -> np.ndarray:
        """Features of this layer from the features of the layer below, (n, n_hidden)."""
        return self.rbm.transform(standardise(below, self.input_mean, self.input_scale))


class FeaturePipeline:
    """A trained model with the front end and standardisation it was trained with.

    Attributes
    ----------
    rbm : RBM
        The first layer: the model of the standardised context windows.
    upper : list of Layer
        Layers stacked on it, bottom to top (empty for one layer).
    config : Config
        The configuration stored in the model file.
    band_mean, band_scale : np.ndarray, shape (n_mels,), float32
        Per-band mean and divisor of the training cache.
    checksum : str
        The model file's checksum.
    metadata : dict
        Everything else the model file's metadata holds (cache summary, ...).
    """

    def __init__(self, rbm: RBM, config: Config, band_mean: np.ndarray, band_scale: np.ndarray,
                 checksum: str, metadata: dict[str, Any], upper: Sequence[Layer] = (),
                 whitening: tuple[np.ndarray, np.ndarray] | None = None) -> None:
        self.rbm = rbm
        self.upper = list(upper)
        self.whitening = whitening
        self.config = config
        self.band_mean = np.asarray(band_mean, np.float32)
        self.band_scale = np.asarray(band_scale, np.float32)
        self.checksum = checksum
        self.metadata = metadata

    def prepare(self, windows: np.ndarray) -> np.ndarray:
        """Standardised context windows as the first layer sees them: each normalised to
        zero mean and unit spread (``training.window_contrast``), then ZCA-whitened
        (``training.whiten``), each step only when the model was trained so."""
        if self.config.training.window_contrast:
            windows = contrast_normalise(windows)
        return windows if self.whitening is None else whiten(windows, *self.whitening)

    def whitening_log_det(self) -> float:
        """log |det| of the whitening matrix (0 without whitening): the log-Jacobian from
        standardised windows to what the first layer models."""
        if self.whitening is None:
            return 0.0
        return float(np.linalg.slogdet(self.whitening[1].astype(np.float64))[1])

    @property
    def top(self) -> RBM:
        """The last layer's RBM (the first layer's when nothing is stacked)."""
        return self.upper[-1].rbm if self.upper else self.rbm

    def n_features(self, layer: str = "top") -> int:
        """Features per frame that ``layer`` (see :data:`LAYERS`) gives."""
        _check_layer(layer)
        widths = [self.rbm.n_hidden, *(u.rbm.n_hidden for u in self.upper)]
        return {"top": widths[-1], "first": widths[0], "all": sum(widths)}[layer]

    def transform_windows(self, windows: np.ndarray, layer: str = "top") -> np.ndarray:
        """Features of standardised context windows, (n, n_features(layer)), float32."""
        _check_layer(layer)
        out = [self.rbm.transform(self.prepare(windows))]
        if layer != "first":
            for upper in self.upper:
                out.append(upper.transform(out[-1]))
        return out[-1] if layer != "all" or len(out) == 1 else np.hstack(out)

    @property
    def history(self) -> list[dict[str, Any]]:
        """The training history, one row per epoch (model files before the trainer kept
        one history carry it in their metadata)."""
        return list(self.metadata.get("history", self.top.history_))

    def standardise(self, frames: np.ndarray) -> np.ndarray:
        """Frames (n, n_mels) to standardised float32 frames, as in training."""
        return standardise(frames, self.band_mean, self.band_scale)

    def stream_features(self, frame_blocks: Iterable[np.ndarray], layer: str = "top"
                        ) -> Iterator[np.ndarray]:
        """Hidden activations of a clip given as consecutive blocks of log-mel frames.

        Rows come out as their context windows complete; the concatenation equals
        :meth:`features` of all the frames (memory stays flat in the clip's length).

        Yields
        ------
        np.ndarray, shape (k, n_hidden), float32
        """
        rows = FeatureRows(self, layer)
        for frames in frame_blocks:
            out = rows.push(frames)
            if len(out):
                yield out
        rest = rows.finish()
        if len(rest):
            yield rest

    def features(self, frames: np.ndarray, layer: str = "top") -> np.ndarray:
        """Hidden activations of a whole clip's log-mel frames.

        Parameters
        ----------
        frames : np.ndarray, shape (n_frames, n_mels)
            Log-mel frames from :class:`timbrel.FrontEnd` with the model's settings.
        layer : {"top", "first", "all"}, default "top"
            Which layer's features, for a stacked model.

        Returns
        -------
        np.ndarray, shape (n_frames, n_features(layer)), float32
        """
        windows = stack_context(self.standardise(frames), self.config.frontend.context)
        return self.transform_windows(windows, layer)


class FeatureRows:
    """Push-style features of one clip: frames in, the rows whose context is complete out.

    Parameters
    ----------
    pipe : FeaturePipeline
    layer : {"top", "first", "all"}, default "top"
    """

    def __init__(self, pipe: FeaturePipeline, layer: str = "top") -> None:
        _check_layer(layer)
        self.pipe = pipe
        self.layer = layer
        self._stacker = ContextStacker(pipe.config.frontend.context)

    def _transform(self, windows: np.ndarray) -> np.ndarray:
        if len(windows) == 0:
            return np.empty((0, self.pipe.n_features(self.layer)), np.float32)
        return self.pipe.transform_windows(windows, self.layer)

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
        config = Config.from_stored(meta["config"], source=str(path))
        band_mean = model.arrays["band_mean"]
        band_scale = model.arrays["band_scale"]
    except KeyError as exc:
        raise ModelFileError(f"{path}: not a trained timbrel pipeline (missing {exc})") from None
    if band_mean.shape != (config.frontend.n_mels,) or band_scale.shape != band_mean.shape:
        raise ModelFileError(f"{path}: band statistics do not match {config.frontend.n_mels} bands")
    layers = _stacked_layers(path, model) if "stack" in meta else [model.rbm]
    first, upper = layers[0], [_layer(path, model, i + 2, rbm) for i, rbm in
                               enumerate(layers[1:])]
    if first.n_features_in_ != config.frontend.n_visible:
        raise ModelFileError(f"{path}: model has {first.n_features_in_} visible units but its "
                             f"front end gives {config.frontend.n_visible}")
    return FeaturePipeline(first, config, band_mean, band_scale, model.checksum, meta, upper,
                           _whitening(path, model, config))


#: Added to each window's variance before dividing by its spread, in the units of
#: standardised windows (where a value's variance over the training windows is 1): keeps
#: near-silent, near-flat windows from being blown up into noise.
CONTRAST_EPSILON = 0.1


def contrast_normalise(windows: np.ndarray, epsilon: float = CONTRAST_EPSILON) -> np.ndarray:
    """Each window minus its own mean, divided by its own spread: ``(w - mean(w)) /
    sqrt(var(w) + epsilon)`` over the window's values.

    The brightness and contrast normalisation of each input before whitening and feature
    learning in Coates, Lee & Ng 2011. On log-mel windows it removes the window's overall
    level and scales its spectro-temporal relief to a common size, so features respond to
    the shape of the sound rather than to how loud or how far away it was recorded.

    Parameters
    ----------
    windows : np.ndarray, shape (n_windows, n_visible)
    epsilon : float, default=CONTRAST_EPSILON

    Returns
    -------
    np.ndarray, shape (n_windows, n_visible), float32

    Examples
    --------
    >>> import numpy as np
    >>> w = np.array([[1.0, 3.0], [10.0, 30.0]], np.float32)
    >>> contrast_normalise(w, 1e-6).round(3)
    array([[-1.,  1.],
           [-1.,  1.]], dtype=float32)
    """
    w = np.asarray(windows, np.float32)
    centred = w - w.mean(axis=1, keepdims=True)
    spread = np.sqrt(np.square(centred).mean(axis=1, keepdims=True) + np.float32(epsilon))
    return centred / spread


def whiten(windows: np.ndarray, mean: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """``(windows - mean) @ matrix`` in float32 (see :func:`timbrel.windows.zca_whitening`)."""
    centred = np.asarray(windows, np.float32) - mean
    return centred @ matrix


def _whitening(path: str | Path, model: ModelFile, config: Config
               ) -> tuple[np.ndarray, np.ndarray] | None:
    if config.training.whiten == "none":
        return None
    n = config.frontend.n_visible
    try:
        mean, matrix = model.arrays["whiten_mean"], model.arrays["whiten_matrix"]
    except KeyError as exc:
        raise ModelFileError(f"{path}: trained on whitened windows but lacks {exc}") from None
    if mean.shape != (n,) or matrix.shape != (n, n):
        raise ModelFileError(f"{path}: whitening arrays do not match {n} visible values")
    return np.asarray(mean, np.float32), np.asarray(matrix, np.float32)


def _check_layer(layer: str) -> None:
    if layer not in LAYERS:
        raise ParameterError(f"layer {layer!r} is not one of {', '.join(LAYERS)}")


def layer_arrays(pipe: FeaturePipeline) -> tuple[list[dict[str, Any]], dict[str, np.ndarray]]:
    """How a model file stores ``pipe``'s layers when a new layer is stacked on it.

    Returns
    -------
    stack : list of dict
        ``hyperparameters`` and ``n_features_in`` of each layer, bottom to top (the
        model file's ``stack`` metadata).
    arrays : dict of str to ndarray
        ``layerK.NAME`` for each layer K (from 1) and parameter NAME, and
        ``layerK.input_mean`` / ``layerK.input_scale`` for K >= 2, and the first
        layer's whitening (``whiten_mean``, ``whiten_matrix``) when it has one.
    """
    rbms = [pipe.rbm, *(u.rbm for u in pipe.upper)]
    stack, arrays = [], {}
    for k, rbm in enumerate(rbms, start=1):
        hyper = rbm.get_params()
        if hyper["layout"] is not None:
            hyper["layout"] = [int(n) for n in hyper["layout"]]
        stack.append({"hyperparameters": hyper, "n_features_in": int(rbm.n_features_in_)})
        arrays.update({f"layer{k}.{name}": a for name, a in rbm.parameter_arrays().items()})
    for k, upper in enumerate(pipe.upper, start=2):
        arrays[f"layer{k}.input_mean"] = upper.input_mean
        arrays[f"layer{k}.input_scale"] = upper.input_scale
    if pipe.whitening is not None:
        arrays["whiten_mean"], arrays["whiten_matrix"] = pipe.whitening
    return stack, arrays


def _stacked_layers(path: str | Path, model: ModelFile) -> list[RBM]:
    """The layers of a stacked model file: those stored under it, then its own RBM."""
    layers = []
    try:
        for k, entry in enumerate(model.metadata["stack"], start=1):
            params = {name: model.arrays[f"layer{k}.{name}"] for name in PARAM_ARRAYS}
            hyper = dict(entry["hyperparameters"])
            if hyper.get("layout") is not None:
                hyper["layout"] = tuple(hyper["layout"])
            layers.append(rbm_from_parameters(hyper, entry["n_features_in"], params,
                                              source=path, prefix=f"user.layer{k}."))
    except (KeyError, TypeError) as exc:
        raise ModelFileError(f"{path}: a stacked model without its lower layers "
                             f"(missing {exc})") from None
    for below, above in zip(layers, [*layers[1:], model.rbm], strict=True):
        if below.n_hidden != above.n_features_in_:
            raise ModelFileError(f"{path}: a layer of {above.n_features_in_} inputs sits on "
                                 f"one of {below.n_hidden} units")
    return [*layers, model.rbm]


def _layer(path: str | Path, model: ModelFile, k: int, rbm: RBM) -> Layer:
    """Layer ``k`` (from 2) with its input statistics; the top's are the file's own."""
    top = k == len(model.metadata.get("stack", [])) + 1
    key = "" if top else f"layer{k}."
    try:
        mean, scale = model.arrays[f"{key}input_mean"], model.arrays[f"{key}input_scale"]
    except KeyError as exc:
        raise ModelFileError(f"{path}: layer {k} lacks its input statistics ({exc})") from None
    if mean.shape != (rbm.n_features_in_,) or scale.shape != mean.shape:
        raise ModelFileError(f"{path}: layer {k}'s input statistics do not match its "
                             f"{rbm.n_features_in_} inputs")
    return Layer(rbm, np.asarray(mean, np.float32), np.asarray(scale, np.float32))


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
        "layers": [{"n_visible": int(r.n_features_in_), "n_hidden": int(r.n_hidden),
                    "hidden": r.hidden, "visible": r.visible}
                   for r in [rbm, *(u.rbm for u in pipe.upper)]],
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
    if len(s.get("layers", [])) > 1:
        lines.append("stack      " + " -> ".join(
            [str(s["n_visible"]), *(f"{layer['n_hidden']} {layer['hidden']}"
                                    for layer in s["layers"])])
                     + "  (the epochs and figures below are the top layer's)")
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
