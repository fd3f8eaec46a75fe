"""The frame cache: log-mel frames of every clip, computed once, memory-mappable.

Layout of a cache folder::

    cache.json              completion marker: format, config snapshot, band statistics,
                            totals and the name of the current index (written last)
    index-<id>.parquet      one row per clip (schema: :data:`INDEX_SCHEMA` + manifest columns)
    shards/<id>.f32         raw float32 frames of the clips of one worker task, row-major,
                            shape (n_frames, n_mels)
    shards/<id>.json        the shard's clip entries, written after the shard is complete
    failures.csv            files that could not be used, with the reason

Every file is written under a temporary name and renamed when complete; ``cache.json``
is renamed last, so a crash never leaves a cache that reads as complete. A re-run reuses
every clip whose file (path, size, modification time) and frame settings are unchanged,
including clips finished by a run that crashed.
"""

from __future__ import annotations

import collections
import csv
import dataclasses
import json
import os
import time
import uuid
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import __version__, store
from ._atomic import os_reason
from ._errors import AudioReadError, CacheError, OutputError, ParameterError
from ._progress import progress_bar
from ._threads import single_blas_thread
from ._workers import Interrupted, dask_results, even_chunks, task_results
from .audio import (
    AudioItem,
    counted_blocks,
    discover,
    display_name,
    read_blocks,
    read_info,
    unreadable_reason,
)
from .config import Config, FrontEndConfig
from .frontend import BandStats, FrontEnd

__all__ = ["INDEX_SCHEMA", "CacheSummary", "ClipFailure", "FrameCache", "build_cache"]

CACHE_FORMAT = "timbrel-frame-cache"
CACHE_VERSION = 1
MARKER = "cache.json"
SHARDS = "shards"
FAILURES = "failures.csv"

#: Columns every index has; manifest columns follow as strings.
INDEX_SCHEMA = pa.schema([
    pa.field("clip", pa.int32(), nullable=False),
    pa.field("source", pa.string(), nullable=False),
    pa.field("shard", pa.string(), nullable=False),
    pa.field("offset", pa.int64(), nullable=False),
    pa.field("n_frames", pa.int64(), nullable=False),
    pa.field("duration_s", pa.float64(), nullable=False),
    pa.field("sample_rate", pa.int32(), nullable=False),
    pa.field("channels", pa.int32(), nullable=False),
    pa.field("file_size", pa.int64(), nullable=False),
    pa.field("mtime_ns", pa.int64(), nullable=False),
])

#: Files per worker task: each task writes one shard.
FILES_PER_TASK = 16
#: Frames of one clip folded into the band statistics at a time: bounds memory.
STATS_FRAMES = 16384
#: Bytes of recently read clips a cache in an object store keeps in memory.
STORE_CLIP_BYTES = 256 * 2**20


@dataclasses.dataclass(frozen=True)
class ClipFailure:
    """A file that could not be used, and why."""

    source: str
    reason: str


@dataclasses.dataclass
class CacheSummary:
    """What :func:`build_cache` did."""

    path: Path | str
    n_files: int
    n_clips: int
    n_reused: int
    n_frames: int
    audio_seconds: float
    wall_seconds: float
    failures: list[ClipFailure]

    @property
    def n_failed(self) -> int:
        """Files that could not be used."""
        return len(self.failures)

    def line(self) -> str:
        """One-line summary for a person."""
        text = (f"{self.n_clips} of {self.n_files} files cached ({self.n_reused} reused), "
                f"{self.n_frames} frames, {self.audio_seconds / 3600:.3f} h of audio "
                f"in {self.wall_seconds:.1f} s")
        if self.failures:
            text += f"; {self.n_failed} FAILED (see {store.join(str(self.path), FAILURES)})"
        return text


def _file_key(item: AudioItem) -> tuple[int, int]:
    if store.is_url(item.path):
        return store.stat_key(str(item.path))
    st = os.stat(item.path)
    return int(st.st_size), int(st.st_mtime_ns)


def _clip_key(source: str, size: int, mtime_ns: int, frame_key: str) -> str:
    return f"{frame_key}|{size}|{mtime_ns}|{source}"


def _process_task(task: dict[str, Any]) -> dict[str, Any]:
    """Worker: frame a group of files into one shard; return its entries and failures."""
    with single_blas_thread():
        return _frame_task(task)


def _frame_task(task: dict[str, Any]) -> dict[str, Any]:
    fe_config = FrontEndConfig(**task["frontend"])
    frontend = FrontEnd(fe_config)
    out = store.folder(task["out"])
    shard_id = task["shard_id"]
    entries: list[dict[str, Any]] = []
    failures: list[tuple[str, str]] = []
    frames_path = out.url(f"{SHARDS}/{shard_id}.f32")
    with out.writing(f"{SHARDS}/{shard_id}.f32") as tmp, open(tmp, "wb") as fh:

        def write(data: bytes) -> None:
            # a write error is the output's fault, never the input file's: it stops the run
            try:
                fh.write(data)
            except OSError as exc:
                raise OutputError(frames_path, os_reason(exc)) from None

        offset = 0
        for job in task["files"]:
            start = fh.tell()
            try:
                entry = _frame_one(job, frontend, write)
            except store.StoreUnreachable:
                raise  # the network's fault, not the file's: the run stops
            except (AudioReadError, ParameterError, store.StoreError, OSError, ValueError,
                    RuntimeError) as exc:
                fh.seek(start)
                fh.truncate(start)
                reason = exc.reason if isinstance(exc, AudioReadError) else str(exc)
                failures.append((job["source"], reason))
                continue
            entry["offset"] = offset
            offset += entry["n_frames"]
            entries.append(entry)
        fh.flush()
    sidecar = {"format": CACHE_FORMAT, "n_mels": fe_config.n_mels,
               "frame_key": task["frame_key"], "clips": entries}
    with out.writing(f"{SHARDS}/{shard_id}.json") as tmp:
        tmp.write_text(json.dumps(sidecar), encoding="utf-8")
    return {"shard": shard_id, "entries": entries, "failures": failures}


def _frame_one(job: dict[str, Any], frontend: FrontEnd, write: Callable[[bytes], None]
               ) -> dict[str, Any]:
    c = frontend.config
    n_frames = 0
    n_samples = [0]  # decoded samples, for the reason a clip too short gives
    with store.local_copy(job["path"]) as path:
        info = read_info(path)
        blocks = counted_blocks(read_blocks(path, sr=c.sample_rate, channel=c.channel),
                                n_samples)
        for frames in frontend.stream(blocks, c.sample_rate):
            write(np.ascontiguousarray(frames, np.float32).tobytes())
            n_frames += len(frames)
    if n_frames == 0:
        raise AudioReadError(display_name(job["path"]), frontend.too_short_reason(n_samples[0]))
    return {"source": job["source"], "key": job["key"], "n_frames": n_frames,
            "duration_s": info.duration, "sample_rate": info.sample_rate,
            "channels": info.channels, "file_size": job["size"], "mtime_ns": job["mtime_ns"]}


def _read_sidecars(out: store.Folder, frame_key: str) -> dict[str, dict[str, Any]]:
    """Clip entries of every complete shard with these frame settings, by clip key."""
    pool: dict[str, dict[str, Any]] = {}
    for meta in out.names(f"{SHARDS}/*.json"):
        try:
            data = json.loads(out.read_bytes(meta).decode("utf-8"))
        except (OSError, ValueError, store.StoreError):
            continue
        if data.get("format") != CACHE_FORMAT or data.get("frame_key") != frame_key:
            continue
        size = out.size(meta[:-len(".json")] + ".f32")
        if size is None:
            continue
        n_total = size // (4 * int(data["n_mels"]))
        stem = meta[len(SHARDS) + 1:-len(".json")]
        for entry in data["clips"]:
            if entry["offset"] + entry["n_frames"] <= n_total:
                pool[entry["key"]] = {**entry, "shard": stem}
    return pool


def build_cache(
    source: str | Path,
    out: str | Path,
    *,
    config: Config | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    allow_outside: bool = False,
    progress: bool = False,
) -> CacheSummary:
    """Compute the log-mel frames of every clip in ``source`` into a cache folder.

    Parameters
    ----------
    source : str or Path
        A folder of audio files or a manifest CSV (see :func:`timbrel.audio.discover`),
        local or a URL (``s3://bucket/prefix/``, see :mod:`timbrel.store`).
    out : str or Path
        Cache folder, local or a URL; created if missing. An existing cache there is
        updated: unchanged clips are reused, clips no longer in the source are dropped.
    config : Config, optional
        Defaults to :class:`timbrel.config.Config()`.
    workers : int, optional
        Worker processes; default: the number of CPU cores. ``1`` runs in-process.
    scheduler : str, optional
        Address of a Dask scheduler (``tcp://host:8786``): the files are framed by its
        workers instead of local processes, into the same shards. Each worker must reach
        the sources and ``out`` (a store URL, or a shared file system).
    allow_outside : bool, default False
        Accept manifest paths outside the manifest's folder.
    progress : bool, default False
        Show a progress bar on standard error.

    Returns
    -------
    CacheSummary
        Counts, frames, audio duration, wall time and the failed files. Failed files
        are also listed in ``out/failures.csv``; good files are cached regardless.

    Raises
    ------
    ParameterError
        If the source is missing or malformed, or ``out`` is not a usable folder.
    CacheError
        If another run is writing into ``out`` (it holds ``out/.lock``).
    timbrel.store.StoreError
        If a store refuses or fails (no such bucket, no credentials, access denied).
    timbrel._workers.Interrupted
        On Ctrl-C (or SIGTERM, as the command line turns it into one): the workers are
        stopped, temporaries removed, finished shards kept for a re-run to reuse.
    """
    t0 = time.perf_counter()
    config = config or Config()
    dest = store.output_folder(out)
    items, extra_columns = discover(source, allow_outside=allow_outside)
    dest.prepare(SHARDS)
    with dest.lock(error=CacheError, busy="another `frames` run is writing into this "
                   "cache (lock held); wait for it or choose another --out"):
        try:
            return _build_locked(source, dest, items, extra_columns, config=config,
                                 workers=workers, scheduler=scheduler, progress=progress,
                                 t0=t0)
        except KeyboardInterrupt:
            raise _interrupted(dest, config.frontend.frame_key(), len(items)) from None


def _interrupted(out: store.Folder, frame_key: str, n_files: int) -> Interrupted:
    """What a stopped run leaves: finished shards kept, temporaries removed.

    The workers have already ended (:func:`timbrel._workers.task_results`); a re-run
    reuses every clip of a finished shard."""
    out.clean_temporaries(SHARDS)
    kept = len(_read_sidecars(out, frame_key))
    return Interrupted(f"{out.location}: interrupted; the frames of {kept} of {n_files} files "
                       "are kept in finished shards, partial shards removed; run the same "
                       "command again to continue")


def _build_locked(source: str | Path, out: store.Folder, items: list[AudioItem],
                  extra_columns: list[str], *, config: Config, workers: int | None,
                  scheduler: str | None, progress: bool, t0: float) -> CacheSummary:
    """The body of :func:`build_cache`, run while holding the cache folder's lock."""
    fe = config.frontend
    frame_key = fe.frame_key()
    out.clean_temporaries(SHARDS)

    pool = _read_sidecars(out, frame_key)
    failures: dict[str, str] = {}
    entries: dict[str, dict[str, Any]] = {}
    todo: list[dict[str, Any]] = []
    for item in items:
        try:
            size, mtime_ns = _file_key(item)
        except OSError as exc:
            failures[item.source] = unreadable_reason(exc)
            continue
        except store.StoreUnreachable:
            raise
        except store.StoreError as exc:
            failures[item.source] = str(exc).split(": ", 1)[-1]
            continue
        key = _clip_key(item.source, size, mtime_ns, frame_key)
        if key in pool:
            entries[item.source] = pool[key]
        else:
            todo.append({"path": os.fsdecode(item.path), "source": item.source, "key": key,
                         "size": size, "mtime_ns": mtime_ns})
    n_reused = len(entries)
    workers = max(1, workers or os.cpu_count() or 1)
    tasks = [{"frontend": dataclasses.asdict(fe), "frame_key": frame_key,
              "out": out.location, "shard_id": uuid.uuid4().hex[:16],
              "files": chunk} for chunk in even_chunks(todo, workers, most=FILES_PER_TASK)]

    # the pool starts before the progress bar's thread, so its workers can be forked
    with (dask_results(_process_task, tasks, scheduler, error=CacheError,
                       key=lambda t: f"timbrel-frames-{t['shard_id']}") if scheduler
          else task_results(_process_task, tasks, workers, preload=[__name__])) as results, \
            progress_bar(progress) as bar:
        task_id = bar.add_task("frames", total=len(items), info="")
        bar.advance(task_id, n_reused + len(failures))
        done_seconds = 0.0
        for result in results:
            for entry in result["entries"]:
                entries[entry["source"]] = {**entry, "shard": result["shard"]}
                done_seconds += entry["duration_s"]
            for src, reason in result["failures"]:
                failures[src] = reason
            elapsed = time.perf_counter() - t0
            n_done = len(result["entries"]) + len(result["failures"])
            bar.advance(task_id, n_done)
            bar.update(task_id, info=f"{done_seconds / 3600:.2f} h audio, "
                       f"{done_seconds / max(elapsed, 1e-9):.0f}x realtime")

    by_source = {item.source: item for item in items}
    ordered = [src for src in (item.source for item in items) if src in entries]
    stats = BandStats(fe.n_mels)
    columns: dict[str, list[Any]] = {name: [] for name in INDEX_SCHEMA.names}
    extra: dict[str, list[str]] = {name: [] for name in extra_columns}
    for clip, src in enumerate(ordered):
        entry = entries[src]
        for name in INDEX_SCHEMA.names:
            columns[name].append(clip if name == "clip" else entry[name])
        for name in extra_columns:
            extra[name].append(by_source[src].extra.get(name, ""))
    index = pa.table({**columns, **extra}, schema=_index_schema(extra_columns))
    cache_view = FrameCache(out, index=index, n_mels=fe.n_mels)
    for clip in range(len(ordered)):
        frames = cache_view.clip_frames(clip)
        # in pieces: a whole long clip in float64, with temporaries, is ~400 MB per 3 hours
        for start in range(0, len(frames), STATS_FRAMES):
            stats.update(frames[start:start + STATS_FRAMES])

    index_name = f"index-{uuid.uuid4().hex[:16]}.parquet"
    with out.writing(index_name) as tmp:
        pq.write_table(index, tmp, compression="zstd")
    failure_list = [ClipFailure(display_name(s), r) for s, r in sorted(failures.items())]
    _write_failures(out, failure_list)
    n_frames = int(sum(entries[s]["n_frames"] for s in ordered))
    audio_seconds = float(sum(entries[s]["duration_s"] for s in ordered))
    marker = {
        "format": CACHE_FORMAT, "version": CACHE_VERSION, "timbrel": __version__,
        "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "source": store.absolute(source), "index": index_name,
        "config": config.to_dict(), "frame_key": frame_key,
        "n_clips": len(ordered), "n_frames": n_frames, "audio_seconds": audio_seconds,
        "n_failed": len(failure_list), "band_stats": stats.to_dict(),
        "extra_columns": extra_columns,
    }
    with out.writing(MARKER) as tmp:
        tmp.write_text(json.dumps(marker, indent=1), encoding="utf-8")
    _collect_garbage(out, keep_index=index_name,
                     keep_shards={entries[s]["shard"] for s in ordered})
    return CacheSummary(path=out.where, n_files=len(items), n_clips=len(ordered), n_reused=n_reused,
                        n_frames=n_frames, audio_seconds=audio_seconds,
                        wall_seconds=time.perf_counter() - t0, failures=failure_list)


def _index_schema(extra_columns: Sequence[str]) -> pa.Schema:
    schema = INDEX_SCHEMA
    for name in extra_columns:
        schema = schema.append(pa.field(name, pa.string()))
    return schema


def _write_failures(out: store.Folder, failures: list[ClipFailure]) -> None:
    with out.writing(FAILURES) as tmp, open(tmp, "w", encoding="utf-8", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["source", "reason"])
        for failure in failures:
            writer.writerow([failure.source, failure.reason])


def _collect_garbage(out: store.Folder, *, keep_index: str, keep_shards: set[str]) -> None:
    for old in out.names("index-*.parquet"):
        if old != keep_index:
            out.remove(old)
    for shard in out.names(f"{SHARDS}/*.f32"):
        if shard[len(SHARDS) + 1:-len(".f32")] not in keep_shards:
            out.remove(shard)
            out.remove(shard[:-len(".f32")] + ".json")


class FrameCache:
    """Read access to a complete frame cache.

    Use :meth:`open`. Frames of a local cache are memory-mapped, so a cache larger than
    RAM is fine. A cache in an object store is read by byte range, one clip at a time,
    and the most recent clips are kept in memory up to :data:`STORE_CLIP_BYTES` bytes:
    training streams its minibatches from the store without copying the cache.

    Attributes
    ----------
    path : Path or str
        The folder (a URL for a cache in a store).
    index : pyarrow.Table
        One row per clip (see :data:`INDEX_SCHEMA`), plus manifest columns.
    config : Config
        The configuration the frames were made with.
    band_stats : BandStats
        Per-band statistics over every cached frame.
    extra_columns : list of str
        Manifest columns carried through.
    """

    def __init__(self, path: str | Path | store.Folder, *, index: pa.Table, n_mels: int,
                 marker: dict[str, Any] | None = None) -> None:
        self.folder = path if isinstance(path, store.Folder) else store.folder(path)
        self.path = self.folder.where
        self.index = index
        self.n_mels = n_mels
        self.marker = marker or {}
        self._shards = index.column("shard").to_pylist()
        self._offsets = np.asarray(index.column("offset").to_numpy(), np.int64)
        self._counts = np.asarray(index.column("n_frames").to_numpy(), np.int64)
        self._maps: dict[str, np.memmap] = {}
        self._recent: collections.OrderedDict[int, np.ndarray] = collections.OrderedDict()

    @classmethod
    def open(cls, path: str | Path) -> FrameCache:
        """Open a cache folder made by :func:`build_cache`.

        Raises
        ------
        CacheError
            If the folder is missing, incomplete (no marker: a run never finished),
            of another format or version, or a shard is missing or short.
        """
        folder = store.folder(path)
        marker_path = folder.url(MARKER)
        if isinstance(folder, store.LocalFolder) and not folder.path.is_dir():
            raise CacheError(f"{path}: no such frame cache folder")
        if folder.size(MARKER) is None:
            raise CacheError(f"{path}: not a complete frame cache (no {MARKER}; "
                             "build it with the frames command)")
        try:
            marker = json.loads(folder.read_bytes(MARKER).decode("utf-8"))
        except (OSError, ValueError) as exc:
            raise CacheError(f"{marker_path}: unreadable ({exc})") from None
        if marker.get("format") != CACHE_FORMAT:
            raise CacheError(f"{marker_path}: not a timbrel frame cache")
        if int(marker.get("version", 0)) > CACHE_VERSION:
            raise CacheError(f"{marker_path}: cache format version {marker['version']} is newer "
                             f"than this timbrel reads ({CACHE_VERSION}); upgrade timbrel")
        try:
            index = pq.read_table(pa.BufferReader(folder.read_bytes(marker["index"])))
        except (OSError, pa.ArrowException) as exc:
            raise CacheError(f"{folder.url(marker['index'])}: unreadable index ({exc})"
                             ) from None
        n_mels = int(marker["config"]["frontend"]["n_mels"])
        cache = cls(folder, index=index, n_mels=n_mels, marker=marker)
        cache._check_shards()
        return cache

    def _check_shards(self) -> None:
        need: dict[str, int] = {}
        for shard, offset, count in zip(self._shards, self._offsets, self._counts, strict=True):
            need[shard] = max(need.get(shard, 0), int(offset + count))
        for shard, rows in need.items():
            frames_path = self.folder.url(f"{SHARDS}/{shard}.f32")
            size = self.folder.size(f"{SHARDS}/{shard}.f32")
            if size is None:
                raise CacheError(f"{frames_path}: shard missing; rebuild the cache")
            if size < rows * self.n_mels * 4:
                raise CacheError(f"{frames_path}: shard shorter than its index says; "
                                 "rebuild the cache")

    @property
    def config(self) -> Config:
        """The configuration the cache was made with."""
        return Config.from_dict(self.marker["config"], source=self.folder.url(MARKER))

    @property
    def band_stats(self) -> BandStats:
        """Per-band statistics over every cached frame."""
        return BandStats.from_dict(self.marker["band_stats"])

    @property
    def extra_columns(self) -> list[str]:
        """Manifest columns carried through."""
        return list(self.marker.get("extra_columns", []))

    @property
    def n_frames(self) -> int:
        """Frames in the whole cache."""
        return int(self._counts.sum())

    @property
    def frame_counts(self) -> np.ndarray:
        """Frames per clip, shape (n_clips,), int64."""
        return self._counts.copy()

    def __len__(self) -> int:
        return len(self._counts)

    def clip_frames(self, clip: int) -> np.ndarray:
        """Log-mel frames of one clip, shape (n_frames, n_mels), float32, read-only memory map."""
        if not 0 <= clip < len(self._counts):
            raise ParameterError(f"clip = {clip} is outside [0, {len(self._counts)})")
        if not isinstance(self.folder, store.LocalFolder):
            return self._fetched(clip)
        shard = self._shards[clip]
        mm = self._maps.get(shard)
        if mm is None:
            frames_path = self.folder.file(f"{SHARDS}/{shard}.f32")
            rows = frames_path.stat().st_size // (4 * self.n_mels)
            mm = np.memmap(frames_path, dtype=np.float32, mode="r", shape=(rows, self.n_mels))
            self._maps[shard] = mm
        start = int(self._offsets[clip])
        return mm[start:start + int(self._counts[clip])]

    def _fetched(self, clip: int) -> np.ndarray:
        """A clip of a cache in a store: one byte-range read, kept among the recent ones."""
        frames = self._recent.get(clip)
        if frames is not None:
            self._recent.move_to_end(clip)
            return frames
        row_bytes = 4 * self.n_mels
        start = int(self._offsets[clip]) * row_bytes
        stop = start + int(self._counts[clip]) * row_bytes
        data = self.folder.read_range(f"{SHARDS}/{self._shards[clip]}.f32", start, stop)
        frames = np.frombuffer(data, np.float32).reshape(-1, self.n_mels)
        self._recent[clip] = frames
        held = sum(f.nbytes for f in self._recent.values())
        while held > STORE_CLIP_BYTES and len(self._recent) > 1:
            held -= self._recent.popitem(last=False)[1].nbytes
        return frames
