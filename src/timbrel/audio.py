"""Finding and reading audio: folders and manifests in, mono float32 blocks out.

A *source* is either a folder (searched recursively, in a deterministic order)
or a manifest CSV whose ``path`` column names files relative to the CSV's own
folder; every other manifest column (``label``, ``split``, ...) is carried
through to every output. Files are decoded with libsndfile (soundfile) in blocks,
so memory stays bounded whatever a file's length, mixed down to mono (or one
channel kept) and resampled with soxr at high quality.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import math
import os
import posixpath
import struct
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path
from typing import BinaryIO

import numpy as np
import soundfile as sf

from . import store
from ._atomic import os_reason
from ._errors import AudioReadError, ParameterError

__all__ = [
    "AUDIO_EXTENSIONS",
    "MIN_SAMPLE_RATE",
    "AudioInfo",
    "AudioItem",
    "Resampler",
    "array_blocks",
    "counted_blocks",
    "discover",
    "load",
    "read_blocks",
    "read_info",
    "to_mono",
    "unreadable_reason",
]

#: Extensions a folder search picks up (case-insensitive); libsndfile decides what it reads.
AUDIO_EXTENSIONS = (".wav", ".flac", ".ogg", ".oga", ".aif", ".aiff", ".aifc", ".mp3")

#: Seconds of audio decoded per block: bounds memory for any file length.
BLOCK_SECONDS = 20.0
#: Lowest sample rate a file may declare. Recorders and codecs start at 8 kHz for speech
#: (telephony, common practice) and few sound devices go below 4 kHz; a lower figure in
#: a header is far more likely damage than audio, and resampled to a 16 kHz front end
#: it would turn a small file into millions of frames (a 1 Hz header on ten minutes of
#: samples asks for 1.5e11 samples).
MIN_SAMPLE_RATE = 1000


@dataclasses.dataclass(frozen=True)
class AudioItem:
    """One clip to process.

    Attributes
    ----------
    path : Path or str
        Absolute path of the file, or its URL for a source in an object store
        (see :mod:`timbrel.store`).
    source : str
        Path relative to the source root, with ``/`` separators; the clip's name in
        every output. Undecodable bytes in a file name appear as ``\\xNN`` escapes
        (see :func:`display_name`).
    extra : Mapping[str, str]
        Manifest columns other than ``path`` (empty for a folder source).
    """

    path: Path | str
    source: str
    extra: Mapping[str, str] = dataclasses.field(default_factory=dict)


@dataclasses.dataclass(frozen=True)
class AudioInfo:
    """What the file header says: rate, channels, frames, duration."""

    sample_rate: int
    channels: int
    frames: int

    @property
    def duration(self) -> float:
        """Seconds of audio at the file's own rate."""
        return self.frames / self.sample_rate if self.sample_rate else 0.0


def display_name(text: str) -> str:
    """A printable, UTF-8-safe form of a path that may hold undecodable bytes.

    Undecodable bytes become ``\\xNN`` escapes, so distinct names stay distinct.
    """
    return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def discover(source: str | Path, *, allow_outside: bool = False
             ) -> tuple[list[AudioItem], list[str]]:
    """List the clips of a folder or a manifest CSV.

    Parameters
    ----------
    source : str or Path
        A folder (searched recursively for :data:`AUDIO_EXTENSIONS`, sorted by
        relative path) or a ``.csv`` manifest with a ``path`` column. Either may be a
        URL (``s3://bucket/prefix/``): a manifest's relative paths are then relative
        to the manifest's URL.
    allow_outside : bool, default False
        Accept manifest paths that lead outside the manifest's folder (absolute
        paths, ``..``). Refused by default so a manifest cannot make timbrel read
        arbitrary files.

    Returns
    -------
    items : list of AudioItem
        The clips, in a deterministic order.
    extra_columns : list of str
        Manifest columns carried through (empty for a folder).

    Raises
    ------
    ParameterError
        If the source does not exist, holds no audio file (a folder) or no row (a
        manifest), the manifest lacks a ``path`` column, repeats a path, or names a path
        outside its folder without ``allow_outside``.
    """
    if store.is_url(source):
        return _discover_url(str(source), allow_outside=allow_outside)
    root = store.local(source)
    if root.is_dir():
        items = _discover_folder(root)
        if not items:
            raise ParameterError(f"{root}: no audio files in this folder or below (searched "
                                 f"for {', '.join(AUDIO_EXTENSIONS)})")
        return items, []
    if root.is_file() and root.suffix.lower() == ".csv":
        items, extra_columns = _discover_manifest(root, allow_outside=allow_outside)
        if not items:
            raise ParameterError(f"{root}: the manifest lists no files (no row below its "
                                 "header)")
        return items, extra_columns
    if root.is_file():
        raise ParameterError(f"{root}: a source must be a folder or a manifest .csv")
    raise ParameterError(f"{root}: no such folder or manifest")


def _discover_folder(root: Path) -> list[AudioItem]:
    items = []
    seen_dirs: set[tuple[int, int]] = set()
    # os.walk with followlinks would loop on a symlink cycle; track (device, inode).
    for dirpath, dirnames, filenames in os.walk(root, followlinks=True):
        st = os.stat(dirpath)
        if (st.st_dev, st.st_ino) in seen_dirs:
            dirnames[:] = []
            continue
        seen_dirs.add((st.st_dev, st.st_ino))
        dirnames.sort()
        for name in filenames:
            if os.path.splitext(name)[1].lower() in AUDIO_EXTENSIONS:
                path = Path(dirpath) / name
                rel = display_name(path.relative_to(root).as_posix())
                items.append(AudioItem(path=path.absolute(), source=rel))
        # a directory named like an audio file is reported by the reader, not skipped silently
        for name in dirnames:
            if os.path.splitext(name)[1].lower() in AUDIO_EXTENSIONS:
                path = Path(dirpath) / name
                items.append(AudioItem(path=path.absolute(),
                                       source=display_name(path.relative_to(root).as_posix())))
    items.sort(key=lambda item: item.source)
    return items


def _discover_url(url: str, *, allow_outside: bool) -> tuple[list[AudioItem], list[str]]:
    """:func:`discover` for a folder or manifest in an object store."""
    if url.lower().endswith(".csv"):
        if not store.exists(url):
            raise ParameterError(f"{url}: no such manifest")
        text = store.read_bytes(url)
        items, extra = _manifest_items(url, text, allow_outside=allow_outside)
        if not items:
            raise ParameterError(f"{url}: the manifest lists no files (no row below its header)")
        return items, extra
    root = url.rstrip("/")
    items = [AudioItem(path=found, source=found[len(root) + 1:])
             for found in store.list_files(root)
             if posixpath.splitext(found)[1].lower() in AUDIO_EXTENSIONS]
    if not items:
        raise ParameterError(f"{url}: no audio files under this prefix (searched for "
                             f"{', '.join(AUDIO_EXTENSIONS)})")
    return sorted(items, key=lambda item: item.source), []


def _manifest_items(url: str, text: bytes, *, allow_outside: bool
                    ) -> tuple[list[AudioItem], list[str]]:
    """Items of a manifest in a store; relative paths are relative to its URL."""
    try:
        reader = csv.DictReader(io.StringIO(text.decode("utf-8"), newline=""))
        columns = list(reader.fieldnames or [])
        rows = list(reader)
    except UnicodeDecodeError:
        raise ParameterError(f"{url}: manifest is not UTF-8 text") from None
    except csv.Error as exc:
        raise ParameterError(f"{url}: cannot read manifest ({exc})") from None
    if "path" not in columns:
        raise ParameterError(f"{url}: manifest has no 'path' column (columns: {columns})")
    base = store.parent(url)
    extra_columns = [c for c in columns if c != "path"]
    items: list[AudioItem] = []
    seen: set[str] = set()
    for line, row in enumerate(rows, start=2):
        rel = (row.get("path") or "").strip()
        if not rel:
            raise ParameterError(f"{url}:{line}: empty path")
        if store.is_url(rel) or rel.startswith("/") or \
                posixpath.normpath(rel).startswith(".."):
            if not allow_outside:
                raise ParameterError(f"{url}:{line}: path {rel!r} leads outside the "
                                     f"manifest's folder {base}; pass the option that "
                                     "allows outside paths if this is intended")
            target = rel if store.is_url(rel) else store.join(base, rel)
            source = rel
        else:
            source = posixpath.normpath(rel)
            target = store.join(base, source)
        if source in seen:
            raise ParameterError(f"{url}:{line}: path {rel!r} is listed twice")
        seen.add(source)
        items.append(AudioItem(path=target, source=source,
                               extra={c: (row.get(c) or "") for c in extra_columns}))
    return items, extra_columns


def _discover_manifest(manifest: Path, *, allow_outside: bool) -> tuple[list[AudioItem], list[str]]:
    base = manifest.parent.resolve()
    try:
        with open(manifest, newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            columns = list(reader.fieldnames or [])
            rows = list(reader)
    except UnicodeDecodeError:
        raise ParameterError(f"{manifest}: manifest is not UTF-8 text") from None
    except (OSError, csv.Error) as exc:
        raise ParameterError(f"{manifest}: cannot read manifest ({exc})") from None
    if "path" not in columns:
        raise ParameterError(f"{manifest}: manifest has no 'path' column (columns: {columns})")
    extra_columns = [c for c in columns if c != "path"]
    items = []
    seen: set[str] = set()
    for line, row in enumerate(rows, start=2):
        rel = (row.get("path") or "").strip()
        if not rel:
            raise ParameterError(f"{manifest}:{line}: empty path")
        target = (base / rel).resolve() if not os.path.isabs(rel) else Path(rel).resolve()
        inside = target == base or base in target.parents
        if not os.path.isabs(rel) and inside:
            source = Path(os.path.normpath(rel)).as_posix()
        else:
            if not allow_outside:
                raise ParameterError(
                    f"{manifest}:{line}: path {rel!r} leads outside the manifest's folder "
                    f"{base}; pass the option that allows outside paths if this is intended")
            source = target.as_posix()
        if source in seen:
            raise ParameterError(f"{manifest}:{line}: path {rel!r} is listed twice")
        seen.add(source)
        extra = {c: (row.get(c) or "") for c in extra_columns}
        items.append(AudioItem(path=(base / rel) if not os.path.isabs(rel) else Path(rel),
                               source=source, extra=extra))
    return items, extra_columns


def read_info(path: str | Path) -> AudioInfo:
    """Read a file's header.

    Raises
    ------
    AudioReadError
        If the file is missing, unreadable, empty, not audio or has no samples.
    """
    path = Path(path)
    _check_readable(path)
    try:
        # open the file ourselves: libsndfile cannot open names that are not UTF-8
        with open(path, "rb") as raw:
            info = sf.info(raw)
            shortfall = _riff_shortfall(raw) if info.format == "WAV" else None
    except OSError as exc:
        raise AudioReadError(display_name(str(path)), unreadable_reason(exc)) from None
    except (sf.LibsndfileError, RuntimeError, TypeError) as exc:
        raise AudioReadError(display_name(str(path)), _decoder_reason(exc)) from None
    if info.samplerate <= 0:
        raise AudioReadError(display_name(str(path)), f"invalid sample rate {info.samplerate}")
    if info.samplerate < MIN_SAMPLE_RATE:
        raise AudioReadError(display_name(str(path)), f"implausible sample rate "
                             f"{info.samplerate} Hz (below {MIN_SAMPLE_RATE} Hz): a damaged "
                             "header?")
    if info.frames <= 0:
        raise AudioReadError(display_name(str(path)), "holds no samples")
    if shortfall is not None:
        declared, present = shortfall
        raise AudioReadError(display_name(str(path)), f"cut short: its header declares {declared} "
                             f"bytes of samples but the file holds {present}")
    return AudioInfo(sample_rate=int(info.samplerate), channels=int(info.channels),
                     frames=int(info.frames))


def _riff_shortfall(raw: BinaryIO) -> tuple[int, int] | None:
    """``(declared, present)`` bytes of a RIFF/WAVE file's ``data`` chunk if it is cut short.

    libsndfile quietly reads what is there, so a copy cut short would pass for a whole
    clip. Chunks are walked as the RIFF/WAVE specification lays them out (id, 32-bit
    little-endian size, data padded to an even length). A size of 0 or 0xFFFFFFFF means
    "length unknown" (a recorder stopped before finalising the header) and is accepted.
    """
    size = raw.seek(0, os.SEEK_END)
    raw.seek(0)
    head = raw.read(12)
    if len(head) < 12 or head[:4] != b"RIFF" or head[8:] != b"WAVE":
        return None
    pos = 12
    while pos + 8 <= size:
        raw.seek(pos)
        chunk_id, chunk_size = struct.unpack("<4sI", raw.read(8))
        if chunk_id == b"data":
            present = size - pos - 8
            if chunk_size in (0, 0xFFFFFFFF) or chunk_size <= present:
                return None
            return chunk_size, present
        pos += 8 + chunk_size + (chunk_size & 1)
    return None


def counted_blocks(blocks: Iterable[np.ndarray], total: list[int]) -> Iterator[np.ndarray]:
    """Pass decoded ``blocks`` through, adding their sample counts to ``total[0]``."""
    for block in blocks:
        total[0] += block.size
        yield block


def unreadable_reason(exc: OSError) -> str:
    """How a failed ``stat`` or ``open`` of an audio file is reported, in every stage."""
    if isinstance(exc, FileNotFoundError):  # also a symbolic link to nothing
        return "no such file"
    return f"cannot read ({os_reason(exc)})"


def _check_readable(path: Path) -> None:
    name = display_name(str(path))
    if path.is_dir():
        raise AudioReadError(name, "is a folder, not an audio file")
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise AudioReadError(name, unreadable_reason(exc)) from None
    if size == 0:
        raise AudioReadError(name, "empty file (0 bytes)")
    if not os.access(path, os.R_OK):
        raise AudioReadError(name, "permission denied")


def _decoder_reason(exc: BaseException) -> str:
    text = str(exc).strip()
    # libsndfile's messages repeat the path; keep the reason only.
    if ":" in text and "Error opening" in text:
        text = text.rsplit(":", 1)[-1].strip()
    return f"not readable as audio ({text or type(exc).__name__})"


def read_blocks(
    path: str | Path,
    *,
    sr: int,
    channel: int = -1,
    block_seconds: float = BLOCK_SECONDS,
) -> Iterator[np.ndarray]:
    """Decode a file in blocks, as mono float32 at ``sr``.

    Parameters
    ----------
    path : str or Path
        Audio file libsndfile can read.
    sr : int > 0
        Output sample rate; soxr resamples at high quality ("HQ") when the file's
        rate differs. Resampling is streamed, so the concatenated blocks equal a
        whole-file resample up to soxr's own streaming precision.
    channel : int, default -1
        ``-1`` averages all channels (downmix); ``k >= 0`` keeps channel ``k``.
    block_seconds : float > 0, default 20.0
        Seconds of input decoded at once; bounds memory.

    Yields
    ------
    block : np.ndarray, shape (n,), float32
        Consecutive pieces of the clip. Empty blocks are never yielded.

    Raises
    ------
    AudioReadError
        Naming the file and the reason: unreadable, not audio, no samples, a
        missing channel, NaN or infinite samples, or a stream cut short.
    """
    if sr <= 0:
        raise ParameterError(f"sr = {sr} must be positive")
    if block_seconds <= 0:
        raise ParameterError(f"block_seconds = {block_seconds} must be positive")
    path = Path(path)
    name = display_name(str(path))
    info = read_info(path)
    if channel >= info.channels:
        raise AudioReadError(name, f"has {info.channels} channel(s); channel {channel} requested")
    blocksize = max(1, math.ceil(block_seconds * info.sample_rate))
    resampler = Resampler(info.sample_rate, sr)
    n_read = 0
    try:
        with open(path, "rb") as raw, sf.SoundFile(raw) as fh:
            while True:
                try:
                    block = fh.read(blocksize, dtype="float32", always_2d=True)
                except (sf.LibsndfileError, RuntimeError) as exc:
                    raise AudioReadError(name, f"decoding failed after {n_read} frames "
                                         f"({exc})") from None
                last = block.shape[0] < blocksize
                n_read += block.shape[0]
                mono = to_mono(block, channel)
                if not np.isfinite(mono).all():
                    raise AudioReadError(name, "contains NaN or infinite samples")
                out = resampler.push(mono, last=last)
                if out.size:
                    yield out
                if last:
                    break
    except (sf.LibsndfileError, RuntimeError) as exc:
        raise AudioReadError(name, _decoder_reason(exc)) from None
    if n_read == 0:
        raise AudioReadError(name, "holds no samples")


def to_mono(block: np.ndarray, channel: int = -1) -> np.ndarray:
    """One channel of a block of samples, as contiguous float32.

    Parameters
    ----------
    block : np.ndarray, shape (n_samples,) or (n_samples, n_channels)
        Samples as libsndfile and soundfile give them (frames by channels).
    channel : int, default -1
        ``-1`` averages the channels (in float32); ``k >= 0`` keeps channel ``k``.

    Returns
    -------
    np.ndarray, shape (n_samples,), float32

    Examples
    --------
    >>> import numpy as np
    >>> to_mono(np.array([[1.0, 0.0], [0.5, 0.5]], np.float32))
    array([0.5, 0.5], dtype=float32)
    """
    block = np.asarray(block, dtype=np.float32)
    if block.ndim == 1:
        block = block[:, None]
    if block.ndim != 2:
        raise ParameterError(f"audio must be (n_samples,) or (n_samples, n_channels); got "
                             f"shape {block.shape}")
    if channel >= block.shape[1]:
        raise ParameterError(f"audio has {block.shape[1]} channel(s); channel {channel} "
                             f"requested")
    mono = block.mean(axis=1) if channel < 0 else block[:, channel]
    return np.ascontiguousarray(mono, dtype=np.float32)


class Resampler:
    """Streamed high-quality resampling (soxr "HQ"), or nothing when the rates agree.

    soxr's stream gives the same samples however the input is cut into pieces, so a
    file, an array and a live stream resampled through this class agree exactly.

    Parameters
    ----------
    sr_in, sr_out : int > 0
        Input and output sample rates.
    """

    def __init__(self, sr_in: int, sr_out: int) -> None:
        if sr_in <= 0 or sr_out <= 0:
            raise ParameterError(f"sample rates must be positive; got {sr_in} and {sr_out}")
        self._stream = None
        if sr_in != sr_out:
            import soxr  # deferred: only needed when rates differ

            self._stream = soxr.ResampleStream(sr_in, sr_out, 1, dtype="float32",
                                               quality="HQ")

    def push(self, mono: np.ndarray, *, last: bool = False) -> np.ndarray:
        """Resample the next piece (float32, 1-D); ``last`` flushes the filter's tail."""
        if self._stream is None:
            return mono
        return self._stream.resample_chunk(mono, last=last)


def array_blocks(y: np.ndarray, sr_in: int, *, sr: int, channel: int = -1,
                 block_seconds: float = BLOCK_SECONDS) -> Iterator[np.ndarray]:
    """An in-memory signal cut, mixed down and resampled exactly as :func:`read_blocks`
    treats a file with the same samples.

    Parameters
    ----------
    y : np.ndarray, shape (n_samples,) or (n_samples, n_channels)
        Finite samples (floating point).
    sr_in : int > 0
        Their sample rate.
    sr, channel, block_seconds
        As for :func:`read_blocks`.

    Yields
    ------
    block : np.ndarray, shape (n,), float32
    """
    y = np.asarray(y)
    if not np.issubdtype(y.dtype, np.floating):
        raise ParameterError(f"audio must be floating point; got dtype {y.dtype}")
    if not np.isfinite(y).all():
        raise ParameterError("audio contains NaN or infinite samples")
    blocksize = max(1, math.ceil(block_seconds * sr_in))
    resampler = Resampler(sr_in, sr)
    start = 0
    while True:
        block = y[start:start + blocksize]
        start += blocksize
        last = len(block) < blocksize
        out = resampler.push(to_mono(block, channel), last=last)
        if out.size:
            yield out
        if last:
            return


def load(path: str | Path, *, sr: int, channel: int = -1) -> np.ndarray:
    """Read a whole file as one mono float32 array at ``sr`` (see :func:`read_blocks`).

    Returns
    -------
    y : np.ndarray, shape (n_samples,), float32
    """
    with store.local_copy(path) as file:  # fetched first if a URL
        blocks = list(read_blocks(file, sr=sr, channel=channel))
    return np.concatenate(blocks) if blocks else np.zeros(0, np.float32)
