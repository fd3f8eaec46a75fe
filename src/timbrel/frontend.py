"""The log-mel front end: mel filter banks, framing, log compression, band statistics.

Everything here is pure numpy/scipy.fft on arrays; reading files is :mod:`timbrel.audio`'s job.
"""

from __future__ import annotations

import functools
from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np
import scipy.fft

from ._errors import ParameterError
from .config import FrontEndConfig, load_config

__all__ = [
    "BandStats",
    "ContextStacker",
    "FrameStream",
    "FrontEnd",
    "hz_to_mel",
    "mel_band_edges",
    "mel_filter_bank",
    "mel_to_hz",
    "stack_context",
    "standardise",
]


#: Slaney's mel scale: linear at 200/3 Hz per mel below 1 kHz (15 mel), then logarithmic
#: with a step of ln(6.4)/27 per mel: (Hz per mel, break in Hz, break in mel, log step).
_SLANEY = (200.0 / 3.0, 1000.0, 1000.0 / (200.0 / 3.0), float(np.log(6.4) / 27.0))


def hz_to_mel(frequencies: np.ndarray | float, *, scale: str = "slaney") -> np.ndarray:
    """Convert Hz to mels.

    Parameters
    ----------
    frequencies : float or np.ndarray
        Frequencies in Hz, >= 0.
    scale : {"slaney", "htk"}, default "slaney"
        ``"htk"``: ``2595 * log10(1 + f / 700)``. ``"slaney"``: ``3 f / 200`` below
        1 kHz and logarithmic above (27 / log(6.4) mels per e-fold), so 1 kHz is 15 mels.

    Returns
    -------
    np.ndarray, same shape as ``frequencies``, float64
    """
    f = np.asarray(frequencies, dtype=np.float64)
    if scale == "htk":
        return 2595.0 * np.log10(1.0 + f / 700.0)
    if scale != "slaney":
        raise ParameterError(f"scale = {scale!r} is not 'slaney' or 'htk'")
    f_sp, min_log_hz, min_log_mel, logstep = _SLANEY
    linear = f / f_sp
    with np.errstate(divide="ignore"):
        logpart = min_log_mel + np.log(np.maximum(f, 1e-300) / min_log_hz) / logstep
    return np.where(f >= min_log_hz, logpart, linear)


def mel_to_hz(mels: np.ndarray | float, *, scale: str = "slaney") -> np.ndarray:
    """Inverse of :func:`hz_to_mel`."""
    m = np.asarray(mels, dtype=np.float64)
    if scale == "htk":
        return 700.0 * (10.0 ** (m / 2595.0) - 1.0)
    if scale != "slaney":
        raise ParameterError(f"scale = {scale!r} is not 'slaney' or 'htk'")
    f_sp, min_log_hz, min_log_mel, logstep = _SLANEY
    return np.where(m >= min_log_mel, min_log_hz * np.exp(logstep * (m - min_log_mel)), f_sp * m)


def mel_band_edges(*, n_mels: int, fmin: float, fmax: float, scale: str = "slaney"
                   ) -> np.ndarray:
    """Edges of ``n_mels`` triangular bands, evenly spaced in mels from ``fmin`` to ``fmax``.

    Band ``b`` rises from ``edges[b]``, peaks at ``edges[b + 1]`` and falls to
    ``edges[b + 2]``.

    Returns
    -------
    np.ndarray, shape (n_mels + 2,), float64, Hz

    Examples
    --------
    >>> mel_band_edges(n_mels=2, fmin=0.0, fmax=8000.0, scale="htk").round(1)
    array([   0. ,  921.5, 3055.9, 8000. ])
    """
    return mel_to_hz(np.linspace(hz_to_mel(fmin, scale=scale), hz_to_mel(fmax, scale=scale),
                                 n_mels + 2), scale=scale)


@functools.lru_cache(maxsize=32)
def mel_filter_bank(
    *,
    sr: int,
    n_fft: int,
    n_mels: int = 40,
    fmin: float = 0.0,
    fmax: float | None = None,
    scale: str = "slaney",
    norm: str = "slaney",
    dtype: type = np.float32,
) -> np.ndarray:
    """Triangular mel filters over the bins of a real FFT.

    Band edges are spaced evenly in mels between ``fmin`` and ``fmax``; each filter
    rises from its lower edge to its centre and falls to its upper edge, evaluated
    at the FFT bin frequencies ``k * sr / n_fft``.

    Parameters
    ----------
    sr : int > 0
        Sample rate, Hz.
    n_fft : int > 0
        FFT length; the bank has ``1 + n_fft // 2`` columns.
    n_mels : int > 0, default 40
    fmin : float >= 0, default 0.0
    fmax : float, optional
        Defaults to ``sr / 2``.
    scale : {"slaney", "htk"}, default "slaney"
        Mel formula (see :func:`hz_to_mel`).
    norm : {"slaney", "none"}, default "slaney"
        ``"slaney"`` scales each filter by ``2 / (upper - lower edge in Hz)`` so all
        filters have equal area; ``"none"`` leaves peaks at 1.
    dtype : numpy dtype, default np.float32

    Returns
    -------
    np.ndarray, shape (n_mels, 1 + n_fft // 2)
        Read-only (the result is cached and shared between callers).
    """
    if fmax is None:
        fmax = sr / 2
    if not 0 <= fmin < fmax:
        raise ParameterError(f"need 0 <= fmin < fmax; got fmin={fmin}, fmax={fmax}")
    if norm not in ("slaney", "none"):
        raise ParameterError(f"norm = {norm!r} is not 'slaney' or 'none'")
    fft_freqs = np.arange(1 + n_fft // 2, dtype=np.float64) * sr / n_fft
    edges = mel_band_edges(n_mels=n_mels, fmin=fmin, fmax=fmax, scale=scale)
    widths = np.diff(edges)
    ramps = edges[:, None] - fft_freqs[None, :]
    rising = -ramps[:-2] / widths[:-1, None]
    falling = ramps[2:] / widths[1:, None]
    bank = np.maximum(0.0, np.minimum(rising, falling))
    if norm == "slaney":
        bank *= (2.0 / (edges[2:] - edges[:-2]))[:, None]
    bank = bank.astype(dtype)
    bank.setflags(write=False)
    return bank


#: Generalised-cosine coefficients a_k of w(t) = Σ_k a_k cos(k t), t in [-π, π]
#: (Harris 1978; the values scipy.signal.windows uses).  Computed here rather than by
#: scipy.signal because importing that package costs about 0.8 s in every worker.
_COSINE_WINDOWS = {"hann": (0.5, 0.5), "hamming": (0.54, 0.46), "blackman": (0.42, 0.5, 0.08)}


@functools.lru_cache(maxsize=32)
def _analysis_window(kind: str, win_length: int, n_fft: int) -> np.ndarray:
    # periodic window (as for spectral analysis): the symmetric one of win_length + 1
    # points without its last, zero-padded and centred within n_fft
    if kind not in _COSINE_WINDOWS:
        raise ParameterError(f"window = {kind!r} is not one of {', '.join(_COSINE_WINDOWS)}")
    phase = np.linspace(-np.pi, np.pi, win_length + 1)[:-1]
    window = np.zeros(win_length)
    for k, coefficient in enumerate(_COSINE_WINDOWS[kind]):
        window += coefficient * np.cos(k * phase)
    window = window.astype(np.float32)
    left = (n_fft - win_length) // 2
    padded = np.zeros(n_fft, np.float32)
    padded[left:left + win_length] = window
    padded.setflags(write=False)
    return padded


class FrontEnd:
    """Turns mono audio into log-mel frames.

    Parameters
    ----------
    config : FrontEndConfig, optional
        The settings; alternatively pass its keys as keyword arguments,
        e.g. ``FrontEnd(n_mels=64, mel_scale="htk")``.
    **keys
        :class:`timbrel.config.FrontEndConfig` keys.

    Notes
    -----
    Frame ``i`` covers samples ``[i * hop_length, i * hop_length + n_fft)`` and
    starts at ``i * hop_length / sample_rate`` seconds. Its value is
    ``log(M @ |FFT(w * x_i)|**2 + log_offset)`` with the mel bank ``M`` and the
    window ``w`` (``win_length`` samples centred in ``n_fft``), the same as
    ``librosa.feature.melspectrogram(center=False, power=2)`` then a log.
    """

    #: Frames computed per FFT call: bounds the working memory of one batch.
    batch_frames = 4096

    def __init__(self, config: FrontEndConfig | None = None, **keys: object) -> None:
        if config is not None and keys:
            raise ParameterError("pass either a FrontEndConfig or keyword keys, not both")
        self.config = config if config is not None else FrontEndConfig(**keys)  # type: ignore[arg-type]

    @classmethod
    def from_toml(cls, path: str | Path) -> FrontEnd:
        """Build from the ``[frontend]`` table of a TOML configuration file."""
        return cls(load_config(path).frontend)

    def __repr__(self) -> str:
        return f"FrontEnd({self.config!r})"

    @property
    def n_mels(self) -> int:
        """Number of mel bands (columns of :meth:`frames`)."""
        return self.config.n_mels

    @property
    def filter_bank(self) -> np.ndarray:
        """The mel bank in use, shape (n_mels, 1 + n_fft // 2), read-only."""
        c = self.config
        return mel_filter_bank(sr=c.sample_rate, n_fft=c.fft_length, n_mels=c.n_mels,
                               fmin=c.fmin, fmax=c.upper_frequency, scale=c.mel_scale,
                               norm=c.filter_norm)

    def n_frames(self, n_samples: int) -> int:
        """Frames a clip of ``n_samples`` samples (at the config's rate) gives."""
        c = self.config
        if n_samples < c.fft_length:
            return 0
        return 1 + (n_samples - c.fft_length) // c.hop_length

    def too_short_reason(self, n_samples: int) -> str:
        """Why a clip of ``n_samples`` samples (< n_fft, at the config's rate) gives no frame."""
        c = self.config
        return (f"shorter than one analysis window ({n_samples} samples at {c.sample_rate} Hz "
                f"< n_fft {c.fft_length})")

    def frame_times(self, n_frames: int, *, first: int = 0) -> np.ndarray:
        """Start time in seconds of frames ``first`` to ``first + n_frames - 1``, float64."""
        hop, sr = self.config.hop_length, self.config.sample_rate
        return np.arange(first, first + n_frames, dtype=np.float64) * hop / sr

    def frame_centres(self, n_frames: int, *, first: int = 0) -> np.ndarray:
        """Centre time in seconds of each frame: its start plus half the FFT window."""
        return self.frame_times(n_frames, first=first) + \
            self.config.fft_length / 2 / self.config.sample_rate

    def frames(self, y: np.ndarray, sr: int) -> np.ndarray:
        """Log-mel frames of a whole clip, before any standardisation.

        Parameters
        ----------
        y : np.ndarray, shape (n_samples,)
            Mono audio, finite.
        sr : int
            Its sample rate; must equal the config's ``sample_rate`` (resample first,
            e.g. with :func:`timbrel.audio.read_blocks`).

        Returns
        -------
        np.ndarray, shape (n_frames, n_mels), float32
            Empty (0 rows) when the clip is shorter than one FFT window.
        """
        y = self._check_signal(y, sr)
        return self._frames_of(y)

    def stream(self, blocks: Iterable[np.ndarray], sr: int) -> Iterator[np.ndarray]:
        """Log-mel frames of a clip given as consecutive blocks (bounded memory).

        The concatenation of the yielded arrays equals ``frames(concatenate(blocks))``.

        Yields
        ------
        np.ndarray, shape (k, n_mels), float32
        """
        stream = FrameStream(self)
        for block in blocks:
            frames = stream.push(self._check_signal(block, sr))
            if len(frames):
                yield frames

    def _check_signal(self, y: np.ndarray, sr: int) -> np.ndarray:
        if sr != self.config.sample_rate:
            raise ParameterError(f"sr = {sr} differs from the front end's sample_rate "
                                 f"{self.config.sample_rate}; resample first")
        y = np.asarray(y)
        if y.ndim != 1:
            raise ParameterError(f"audio must be mono, shape (n_samples,); got shape {y.shape}")
        if not np.issubdtype(y.dtype, np.floating):
            raise ParameterError(f"audio must be floating point; got dtype {y.dtype}")
        if not np.isfinite(y).all():
            raise ParameterError("audio contains NaN or infinite samples")
        return y.astype(np.float32, copy=False)

    def _frames_of(self, y: np.ndarray) -> np.ndarray:
        c = self.config
        n = self.n_frames(y.size)
        out = np.empty((n, c.n_mels), np.float32)
        if n == 0:
            return out
        window = _analysis_window(c.window, c.win_length, c.fft_length)
        bank_t = np.ascontiguousarray(self.filter_bank.T)
        view = np.lib.stride_tricks.sliding_window_view(y, c.fft_length)[:: c.hop_length]
        for start in range(0, n, self.batch_frames):
            seg = view[start:start + self.batch_frames] * window
            spec = scipy.fft.rfft(seg, axis=1, workers=1)
            power = np.square(spec.real, dtype=np.float32)
            power += np.square(spec.imag, dtype=np.float32)
            mel = power @ bank_t
            mel += np.float32(c.log_offset)
            np.log(mel, out=out[start:start + len(seg)])
        return out


class FrameStream:
    """Push-style :meth:`FrontEnd.frames`: give samples as they come, get the frames
    whose window is now complete.

    The concatenation of every output equals ``frontend.frames(all_samples, sr)``; the
    samples after the last complete frame wait for the next push.

    Examples
    --------
    >>> import numpy as np
    >>> fe = FrontEnd(sample_rate=16000)
    >>> stream = FrameStream(fe)
    >>> y = np.random.default_rng(0).standard_normal(4000).astype(np.float32)
    >>> parts = [stream.push(y[i:i + 100]) for i in range(0, 4000, 100)]
    >>> bool(np.allclose(np.concatenate(parts), fe.frames(y, 16000), atol=1e-5))
    True
    """

    def __init__(self, frontend: FrontEnd) -> None:
        self.frontend = frontend
        self._carry = np.zeros(0, np.float32)

    def push(self, y: np.ndarray) -> np.ndarray:
        """Frames completed by the mono float32 samples ``y`` (at the front end's rate).

        Returns
        -------
        np.ndarray, shape (k, n_mels), float32 (k may be 0)
        """
        fe = self.frontend
        hop, n_fft = fe.config.hop_length, fe.config.fft_length
        buf = np.concatenate([self._carry, y]) if self._carry.size else y
        n = fe.n_frames(buf.size)
        if n:
            frames = fe._frames_of(buf[: (n - 1) * hop + n_fft])
            carry = buf[n * hop:]
        else:
            frames = np.empty((0, fe.n_mels), np.float32)
            carry = buf
        self._carry = np.array(carry, dtype=np.float32, copy=True)
        return frames


def stack_context(frames: np.ndarray, context: int) -> np.ndarray:
    """Stack each frame with ``context`` neighbours on each side.

    Edges repeat the first and last frame, so every frame gets a vector and the
    output has one row per input frame.

    Parameters
    ----------
    frames : np.ndarray, shape (n_frames, n_bands)
    context : int >= 0

    Returns
    -------
    np.ndarray, shape (n_frames, (2 * context + 1) * n_bands), same dtype
        Row ``t`` is ``[frames[t - context], ..., frames[t + context]]`` flattened
        position-major: column ``p * n_bands + b`` is band ``b`` at offset
        ``p - context``.
    """
    frames = np.asarray(frames)
    if frames.ndim != 2:
        raise ParameterError(f"frames must be 2-D (n_frames, n_bands); got shape {frames.shape}")
    if context < 0:
        raise ParameterError(f"context = {context} must be >= 0")
    n, m = frames.shape
    if context == 0 or n == 0:
        return frames.copy() if context == 0 else np.empty((0, (2 * context + 1) * m), frames.dtype)
    padded = np.concatenate([np.repeat(frames[:1], context, axis=0), frames,
                             np.repeat(frames[-1:], context, axis=0)])
    windows = np.lib.stride_tricks.sliding_window_view(padded, (2 * context + 1, m))[:, 0]
    return np.ascontiguousarray(windows.reshape(n, (2 * context + 1) * m))


def context_rows(frames: np.ndarray, start: int, stop: int, context: int) -> np.ndarray:
    """Context vectors of rows ``[start, stop)`` of one clip's frames.

    Equals ``stack_context(frames, context)[start:stop]`` but touches only the rows it
    needs (frames may be a memory map of a long clip).

    Returns
    -------
    np.ndarray, shape (stop - start, (2 * context + 1) * n_bands)
    """
    n = len(frames)
    if not 0 <= start <= stop <= n:
        raise ParameterError(f"rows [{start}, {stop}) outside a clip of {n} frames")
    lo, hi = max(0, start - context), min(n, stop + context)
    piece = np.asarray(frames[lo:hi])
    stacked = stack_context(piece, context)
    # rows near a cut that is not a clip edge saw replicated frames; they are not returned
    return stacked[start - lo: start - lo + (stop - start)]


class ContextStacker:
    """Streaming :func:`stack_context`: feed a clip's frames in blocks, get rows in order.

    Rows come out ``context`` frames late (they need their right-hand neighbours);
    :meth:`finish` returns the rest, with the clip's last frame repeated at the end.
    The concatenation of every output equals ``stack_context(all_frames, context)``.
    """

    def __init__(self, context: int) -> None:
        if context < 0:
            raise ParameterError(f"context = {context} must be >= 0")
        self.context = context
        self._tail: np.ndarray | None = None  # last 2*context frames seen (or fewer)
        self._emitted = 0
        self._seen = 0

    def push(self, frames: np.ndarray) -> np.ndarray:
        """Add frames (k, n_bands); return the rows now complete, shape (j, width)."""
        frames = np.asarray(frames)
        k = self.context
        if self._tail is None:
            if len(frames) == 0:
                return np.empty((0, (2 * k + 1) * frames.shape[1]), frames.dtype)
            # the clip's first frame repeated k times stands left of the clip
            self._tail = np.repeat(frames[:1], k, axis=0)
        buf = np.concatenate([self._tail, frames])
        self._seen += len(frames)
        ready = len(buf) - 2 * k  # rows whose whole window is in buf
        if ready <= 0:
            self._tail = buf
            return np.empty((0, (2 * k + 1) * buf.shape[1]), buf.dtype)
        rows = stack_context(buf, k)[k:k + ready] if k else buf.copy()
        self._tail = buf[ready:]
        self._emitted += ready
        return rows

    def finish(self) -> np.ndarray:
        """Rows still pending, with the last frame repeated on the right."""
        k = self.context
        if self._tail is None or self._emitted == self._seen:
            width = 0 if self._tail is None else (2 * k + 1) * self._tail.shape[1]
            return np.empty((0, width), np.float32 if self._tail is None else self._tail.dtype)
        buf = np.concatenate([self._tail, np.repeat(self._tail[-1:], k, axis=0)])
        pending = self._seen - self._emitted
        rows = stack_context(buf, k)[k:k + pending]
        self._emitted = self._seen
        return rows


def standardise(frames: np.ndarray, mean: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """``(frames - mean) / scale`` per band, in float32; the input is not modified.

    Parameters
    ----------
    frames : np.ndarray, shape (n_frames, n_bands)
    mean, scale : np.ndarray, shape (n_bands,)
        Band statistics (see :class:`BandStats`); both are rounded to float32 first.

    Returns
    -------
    np.ndarray, shape (n_frames, n_bands), float32

    Examples
    --------
    >>> import numpy as np
    >>> standardise(np.array([[1.0, 4.0]]), np.array([1.0, 2.0]), np.array([1.0, 2.0]))
    array([[0., 1.]], dtype=float32)
    """
    out = np.asarray(frames).astype(np.float32, copy=True)
    out -= np.asarray(mean).astype(np.float32)
    out /= np.asarray(scale).astype(np.float32)
    return out


class BandStats:
    """Streaming per-band mean and standard deviation, mergeable across workers.

    Uses Welford's update inside a batch and Chan et al.'s pairwise merge between
    batches, so results do not depend on how frames are split (up to rounding).

    Attributes
    ----------
    count : int
        Frames seen.
    mean : np.ndarray, shape (n_bands,), float64
    m2 : np.ndarray, shape (n_bands,), float64
        Sum of squared deviations from the mean.
    """

    def __init__(self, n_bands: int) -> None:
        if n_bands < 1:
            raise ParameterError(f"n_bands = {n_bands} must be >= 1")
        self.count = 0
        self.mean = np.zeros(n_bands, np.float64)
        self.m2 = np.zeros(n_bands, np.float64)

    @classmethod
    def of(cls, frames: np.ndarray) -> BandStats:
        """Statistics of one array of frames, shape (n_frames, n_bands)."""
        stats = cls(np.asarray(frames).shape[1])
        stats.update(frames)
        return stats

    def update(self, frames: np.ndarray) -> BandStats:
        """Add frames, shape (n_frames, n_bands). Returns ``self``."""
        frames = np.asarray(frames, dtype=np.float64)
        if frames.ndim != 2 or frames.shape[1] != self.mean.size:
            raise ParameterError(f"frames must have shape (n, {self.mean.size}); "
                                 f"got {frames.shape}")
        if len(frames) == 0:
            return self
        other = BandStats(self.mean.size)
        other.count = len(frames)
        other.mean = frames.mean(axis=0)
        other.m2 = np.square(frames - other.mean).sum(axis=0)
        return self.merge(other)

    def merge(self, other: BandStats) -> BandStats:
        """Fold ``other`` into ``self`` (Chan, Golub & LeVeque 1979). Returns ``self``."""
        if other.mean.size != self.mean.size:
            raise ParameterError("cannot merge statistics of different band counts")
        if other.count == 0:
            return self
        if self.count == 0:
            self.count, self.mean, self.m2 = other.count, other.mean.copy(), other.m2.copy()
            return self
        total = self.count + other.count
        delta = other.mean - self.mean
        self.mean = self.mean + delta * (other.count / total)
        self.m2 = self.m2 + other.m2 + np.square(delta) * (self.count * other.count / total)
        self.count = total
        return self

    @property
    def std(self) -> np.ndarray:
        """Population standard deviation per band, shape (n_bands,), float64."""
        if self.count == 0:
            return np.full_like(self.mean, np.nan)
        return np.sqrt(self.m2 / self.count)

    #: Bands whose standard deviation is below this are not rescaled (constant bands).
    std_floor = 1e-6

    @property
    def scale(self) -> np.ndarray:
        """Divisor used to standardise: ``std``, or 1 where a band is (nearly) constant."""
        std = self.std
        return np.where(std > self.std_floor, std, 1.0)

    def standardise(self, frames: np.ndarray) -> np.ndarray:
        """``(frames - mean) / scale`` as float32, shape unchanged (n_frames, n_bands)."""
        return standardise(frames, self.mean, self.scale)

    def to_dict(self) -> dict[str, object]:
        """JSON-able form."""
        return {"count": self.count, "mean": self.mean.tolist(), "m2": self.m2.tolist()}

    @classmethod
    def from_dict(cls, data: dict[str, object]) -> BandStats:
        """Inverse of :meth:`to_dict`."""
        mean = np.asarray(data["mean"], np.float64)
        stats = cls(mean.size)
        stats.count = int(data["count"])  # type: ignore[call-overload]
        stats.mean = mean
        stats.m2 = np.asarray(data["m2"], np.float64)
        return stats
