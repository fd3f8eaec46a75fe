"""Features of audio from a trained model: a waveform, a file, a list of clips, a live stream.

:func:`load` reads a model file into an :class:`Extractor`, which turns audio at any
sample rate into the model's per-frame features exactly as ``timbrel export`` does (the
same downmix, the same streamed resampling, the same framing and standardisation), and
which is a scikit-learn transformer of clips (one pooled vector per clip), so
``make_pipeline(timbrel.load(path), LogisticRegression())`` trains on a list of files.
:meth:`Extractor.stream` gives the features of audio as it arrives, block by block.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path
from typing import IO, Any

import numpy as np

from ._errors import NotFittedError, ParameterError
from .audio import Resampler, array_blocks, read_blocks, to_mono
from .config import FrontEndConfig
from .frontend import FrameStream, FrontEnd
from .pipeline import FeaturePipeline, FeatureRows, describe_model, load_pipeline
from .pooling import PROBE_POOLS, check_pools, pool_frames

__all__ = ["PCM_ENCODINGS", "Extractor", "FeatureStream", "load", "stream_pcm"]

#: Raw sample formats :func:`stream_pcm` reads: little-endian signed 16-bit integers,
#: signed 32-bit integers, or 32-bit floats.
PCM_ENCODINGS = {"s16": ("<i2", 1 / 32768), "s32": ("<i4", 1 / 2147483648), "f32": ("<f4", 1.0)}


def load(path: str | os.PathLike[str], *, pools: Sequence[str] = PROBE_POOLS,
         layer: str = "top") -> Extractor:
    """Read a model file written by ``timbrel fit`` into a ready :class:`Extractor`.

    Parameters
    ----------
    path : str or path-like
        The model file.
    pools : sequence of {"mean", "max", "std"}, default ("max",)
        How :meth:`Extractor.transform` pools a clip's frames (as the probe does).
    layer : {"top", "first", "all"}, default "top"
        Which layer's features, for a stacked model (``timbrel fit --on``).

    Returns
    -------
    Extractor
        Fitted (the model is loaded).

    Examples
    --------
    >>> import timbrel
    >>> extractor = timbrel.load("out/demo/model.npz")  # doctest: +SKIP
    >>> extractor.features(y, 44100).shape  # doctest: +SKIP
    (n_frames, 1024)
    """
    return Extractor(path, pools=pools, layer=layer).fit()


class Extractor:
    """Per-frame features of audio from a trained model file.

    ``__init__`` stores its arguments; :meth:`fit` (or :func:`load`) reads the model.

    Parameters
    ----------
    model : str or path-like
        Model file written by ``timbrel fit``.
    pools : sequence of {"mean", "max", "std"}, default ("max",)
        Pooling of a clip's frames in :meth:`transform` (the probe's default).
    sr : int or None, default None
        Sample rate of the waveforms :meth:`transform` is given; None means the model's
        own rate. Files are read at their own rate.
    layer : {"top", "first", "all"}, default "top"
        Which layer's features, for a stacked model.

    Attributes
    ----------
    pipeline_ : FeaturePipeline
        The model with its front end and band statistics.
    frontend_ : FrontEndConfig
        The front-end settings the model was trained with.
    summary_ : dict
        Sizes, unit kinds, σ per band and training figures (``timbrel inspect``).
    n_features_ : int
        Features per frame (the model's hidden units).
    latency_seconds_ : float
        How long after a frame's start its features can be known: the analysis window
        plus ``context`` hops (the frames to its right in the context window). A stream
        at another rate than the model's adds the resampler's short filter delay.
    """

    def __init__(self, model: str | os.PathLike[str], *, pools: Sequence[str] = PROBE_POOLS,
                 sr: int | None = None, layer: str = "top") -> None:
        self.model = model
        self.pools = pools
        self.sr = sr
        self.layer = layer

    # ---------------------------------------------------------------- scikit-learn face

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        """The ``__init__`` arguments (scikit-learn's estimator protocol)."""
        return {"model": self.model, "pools": self.pools, "sr": self.sr, "layer": self.layer}

    def set_params(self, **params: Any) -> Extractor:
        """Change ``__init__`` arguments; unknown names raise :class:`ParameterError`."""
        for name, value in params.items():
            if name not in self.get_params():
                raise ParameterError(f"unknown Extractor parameter {name!r}; valid: "
                                     f"{', '.join(self.get_params())}")
            setattr(self, name, value)
        return self

    def __repr__(self) -> str:
        return f"Extractor({os.fspath(self.model)!r}, pools={tuple(self.pools)!r})"

    def __sklearn_is_fitted__(self) -> bool:
        return hasattr(self, "pipeline_")

    def fit(self, X: Any = None, y: Any = None) -> Extractor:
        """Read the model file (the features are learned already; X and y are ignored).

        Returns
        -------
        self : Extractor
        """
        check_pools(self.pools)
        if self.sr is not None and (isinstance(self.sr, bool) or not isinstance(self.sr, int)
                                    or self.sr <= 0):
            raise ParameterError(f"sr = {self.sr!r} must be a positive integer or None")
        pipe = load_pipeline(Path(self.model))
        fe = pipe.config.frontend
        self.pipeline_: FeaturePipeline = pipe
        self.frontend_: FrontEndConfig = fe
        self.summary_ = describe_model(Path(self.model), pipe)
        self.n_features_ = pipe.n_features(self.layer)
        self.latency_seconds_ = (fe.fft_length + fe.context * fe.hop_length) / fe.sample_rate
        return self

    def transform(self, X: Iterable[Any]) -> np.ndarray:
        """One pooled feature vector per clip.

        Parameters
        ----------
        X : iterable of audio paths or waveforms
            Paths are read as ``timbrel export`` reads them; a waveform is an array of
            shape (n_samples,) or (n_samples, n_channels) at rate ``sr``.

        Returns
        -------
        np.ndarray, shape (n_clips, len(pools) * n_features), float64
        """
        self._check_fitted()
        rows = [pool_frames(self._clip_features(clip), self.pools) for clip in X]
        if not rows:
            return np.empty((0, len(check_pools(self.pools)) * self.n_features_))
        return np.vstack(rows)

    def fit_transform(self, X: Iterable[Any], y: Any = None) -> np.ndarray:
        """:meth:`fit`, then :meth:`transform` of X."""
        return self.fit().transform(X)

    def _clip_features(self, clip: Any) -> np.ndarray:
        if isinstance(clip, (str, os.PathLike)):
            features = self.file_features(clip)
        else:
            features = self.features(clip, self.sr or self.frontend_.sample_rate)
        if len(features) == 0:
            raise ParameterError(f"{clip if isinstance(clip, (str, os.PathLike)) else 'a clip'}"
                                 f" is shorter than one analysis window")
        return features

    # ---------------------------------------------------------------- features

    def _check_fitted(self) -> None:
        if not hasattr(self, "pipeline_"):
            raise NotFittedError("this Extractor has not read its model yet; call fit() or "
                                 "use timbrel.load(path)")

    def _features_of(self, blocks: Iterator[np.ndarray]) -> np.ndarray:
        frames = FrontEnd(self.frontend_).stream(blocks, self.frontend_.sample_rate)
        parts = list(self.pipeline_.stream_features(frames, self.layer))
        if not parts:
            return np.empty((0, self.n_features_), np.float32)
        return np.concatenate(parts)

    def features(self, y: np.ndarray, sr: int) -> np.ndarray:
        """Features of every frame of a waveform.

        Parameters
        ----------
        y : np.ndarray, shape (n_samples,) or (n_samples, n_channels)
            Finite floating-point samples; channels are mixed down (or one kept) and the
            signal resampled to the model's rate exactly as ``timbrel export`` does.
        sr : int > 0
            Sample rate of ``y``.

        Returns
        -------
        np.ndarray, shape (n_frames, n_features), float32
            Frame ``i`` starts at ``frame_times(n_frames)[i]`` seconds; no rows when the
            clip is shorter than one analysis window.
        """
        self._check_fitted()
        fe = self.frontend_
        return self._features_of(array_blocks(y, sr, sr=fe.sample_rate, channel=fe.channel))

    def file_features(self, path: str | os.PathLike[str]) -> np.ndarray:
        """Features of every frame of an audio file: that file's rows of an export."""
        self._check_fitted()
        fe = self.frontend_
        return self._features_of(read_blocks(Path(path), sr=fe.sample_rate, channel=fe.channel))

    def frame_times(self, n_frames: int) -> np.ndarray:
        """Start time in seconds of each frame, shape (n_frames,), float64."""
        self._check_fitted()
        return FrontEnd(self.frontend_).frame_times(n_frames)

    def stream(self, sr: int) -> FeatureStream:
        """A live stream of audio at rate ``sr``: see :class:`FeatureStream`."""
        self._check_fitted()
        return FeatureStream(self, sr)


class FeatureStream:
    """Features of audio that arrives in blocks of any size, as soon as they are known.

    :meth:`push` takes the next samples (1 to minutes of them) and returns the features
    of every frame whose context window is now complete; :meth:`flush` returns the rest
    at the end. Concatenated, the outputs equal :meth:`Extractor.features` of the whole
    signal. A frame's features come :attr:`Extractor.latency_seconds_` after its start.

    Parameters
    ----------
    extractor : Extractor
        Fitted.
    sr : int > 0
        Sample rate of the pushed audio.

    Examples
    --------
    >>> stream = extractor.stream(48000)  # doctest: +SKIP
    >>> for block in microphone_blocks():  # doctest: +SKIP
    ...     features = stream.push(block)   # (k, n_features), k >= 0
    >>> last = stream.flush()  # doctest: +SKIP
    """

    def __init__(self, extractor: Extractor, sr: int) -> None:
        if isinstance(sr, bool) or not isinstance(sr, (int, np.integer)) or sr <= 0:
            raise ParameterError(f"sr = {sr!r} must be a positive integer")
        fe = extractor.frontend_
        self.extractor = extractor
        self.sr = int(sr)
        self.n_frames = 0
        self._channel = fe.channel
        self._resampler = Resampler(self.sr, fe.sample_rate)
        self._frames = FrameStream(FrontEnd(fe))
        self._rows = FeatureRows(extractor.pipeline_, extractor.layer)
        self._closed = False

    def _count(self, features: np.ndarray) -> np.ndarray:
        self.n_frames += len(features)
        return features

    def push(self, block: np.ndarray) -> np.ndarray:
        """Features of the frames completed by ``block``.

        Parameters
        ----------
        block : np.ndarray, shape (n,) or (n, n_channels)
            The next samples, floating point, at rate ``sr``.

        Returns
        -------
        np.ndarray, shape (k, n_features), float32
            Frames ``n_frames - k`` to ``n_frames - 1`` of the stream (k may be 0).
        """
        if self._closed:
            raise ParameterError("this stream was flushed; start a new one")
        block = np.asarray(block)
        if not np.issubdtype(block.dtype, np.floating) or not np.isfinite(block).all():
            raise ParameterError("a block must hold finite floating-point samples")
        mono = self._resampler.push(to_mono(block, self._channel))
        return self._count(self._rows.push(self._frames.push(mono)))

    def flush(self) -> np.ndarray:
        """Features of the frames still pending at the end of the audio (the last
        ``context`` frames, and any the resampler held back); the stream then closes."""
        if self._closed:
            return np.empty((0, self.extractor.n_features_), np.float32)
        self._closed = True
        tail = self._resampler.push(np.zeros(0, np.float32), last=True)
        last = self._rows.push(self._frames.push(tail))
        return self._count(np.concatenate([last, self._rows.finish()]))


def stream_pcm(model: str | os.PathLike[str], source: IO[bytes], sink: IO[bytes], *,
               rate: int, channels: int = 1, encoding: str = "s16",
               block_seconds: float = 0.01) -> int:
    """Features of raw PCM read from ``source`` as an Arrow IPC stream on ``sink``.

    Reads interleaved little-endian samples as they arrive (``block_seconds`` at a time,
    or less when less is available), and writes one record batch per block that
    completed frames: columns ``frame`` (int64), ``start_s`` (float64, the frame's start
    in seconds) and ``features`` (fixed-size list of float32), so ``pyarrow.ipc.open_stream``
    reads the features while the audio still plays.

    Parameters
    ----------
    model : str or path-like
    source, sink : binary file objects
    rate : int > 0
        Sample rate of the PCM.
    channels : int >= 1, default 1
    encoding : {"s16", "s32", "f32"}, default "s16"
    block_seconds : float > 0, default 0.01

    Returns
    -------
    int
        Frames written.
    """
    import pyarrow as pa

    if encoding not in PCM_ENCODINGS:
        raise ParameterError(f"encoding {encoding!r} is not one of {', '.join(PCM_ENCODINGS)}")
    if channels < 1 or rate <= 0 or block_seconds <= 0:
        raise ParameterError(f"need channels >= 1, rate > 0 and block_seconds > 0; got "
                             f"{channels}, {rate}, {block_seconds}")
    dtype, scale = PCM_ENCODINGS[encoding]
    frame_bytes = np.dtype(dtype).itemsize * channels
    extractor = load(model)
    stream = extractor.stream(rate)
    schema = feature_stream_schema(extractor)
    want = max(1, round(block_seconds * rate)) * frame_bytes
    carry = b""
    with pa.ipc.new_stream(sink, schema) as writer:
        while True:
            data = source.read1(want) if hasattr(source, "read1") else source.read(want)
            if not data:
                break
            data = carry + data
            usable = len(data) - len(data) % frame_bytes
            carry = data[usable:]
            samples = np.frombuffer(data[:usable], dtype).astype(np.float32) * np.float32(scale)
            _write_batch(writer, schema, extractor, stream,
                         stream.push(samples.reshape(-1, channels)))
            sink.flush()
        _write_batch(writer, schema, extractor, stream, stream.flush())
    return stream.n_frames


def feature_stream_schema(extractor: Extractor) -> Any:
    """The Arrow schema of :func:`stream_pcm`'s output, with the model's checksum."""
    import json

    import pyarrow as pa

    return pa.schema([pa.field("frame", pa.int64(), nullable=False),
                      pa.field("start_s", pa.float64(), nullable=False),
                      pa.field("features", pa.list_(pa.float32(), extractor.n_features_),
                               nullable=False)],
                     metadata={b"timbrel": json.dumps(
                         {"model": os.fspath(extractor.model),
                          "checksum": extractor.pipeline_.checksum,
                          "latency_s": extractor.latency_seconds_}).encode()})


def _write_batch(writer: Any, schema: Any, extractor: Extractor, stream: FeatureStream,
                 features: np.ndarray) -> None:
    import pyarrow as pa

    if not len(features):
        return
    first = stream.n_frames - len(features)
    frame = np.arange(first, stream.n_frames, dtype=np.int64)
    values = pa.array(np.ascontiguousarray(features).reshape(-1))
    writer.write_batch(pa.record_batch(
        [pa.array(frame), pa.array(FrontEnd(extractor.frontend_).frame_times(stream.n_frames)
                                   [first:]),
         pa.FixedSizeListArray.from_arrays(values, extractor.n_features_)], schema=schema))
