"""Export: per-frame hidden activations to a Parquet dataset, locally or on a Dask cluster.

A dataset is a folder of part files that pyarrow, DuckDB, pandas, polars and Spark read as
one table, one row per frame::

    DATASET/part-<id>.parquet    frames of a group of clips (schema: :func:`frame_schema`)
    DATASET/_clips/part-<id>.parquet
                                 with ``pool``: one row per clip, pooled features
    DATASET/_export.json         the run record: model checksum, options, finished sources
    DATASET/_failures.csv        files that could not be used, with the reason
    DATASET/.lock, .publish      the running export's lock; the short lock a part is
                                 published under (see :func:`_publishing`)

Names starting with ``_`` or ``.`` are skipped by dataset readers. Each part is written
under a temporary ``.``-name and renamed when complete, and lists its clips in its own
metadata; a re-run skips every clip already in a part, so an export killed at any point
and started again ends with every frame exactly once.
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import fnmatch
import functools
import hashlib
import json
import os
import posixpath
import time
import uuid
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import __version__, store
from ._atomic import LOCK_NAME, TEMP_SUFFIX, os_reason
from ._errors import AudioReadError, ExportError, OutputError, ParameterError
from ._progress import progress_bar
from ._threads import single_blas_thread
from ._workers import Interrupted, dask_results, even_chunks, task_results
from .audio import AudioItem, counted_blocks, discover, display_name, read_blocks, read_info
from .cache import MARKER as CACHE_MARKER
from .cache import FrameCache
from .config import Config
from .events import Event, EventProblem, check_events, frame_labels, read_events
from .frontend import FrontEnd
from .pipeline import FeaturePipeline, load_pipeline
from .pooling import ClipPool, check_pools

__all__ = ["COLUMNS", "ExportSummary", "clip_schema", "export", "frame_schema"]

COLUMNS = ("vector", "wide")
RECORD = "_export.json"
FAILURES = "_failures.csv"
CLIPS_DIR = "_clips"
METADATA_KEY = b"timbrel"
#: Part-file metadata: the clips of the part that failed, with the reason (JSON object).
FAILED_KEY = b"timbrel.failed"
#: Target uncompressed size of one row group: large enough for fast scans, small enough
#: that a reader can work on one group at a time.
ROW_GROUP_BYTES = 32 * 1024 * 1024
FILES_PER_TASK = 8
#: Parquet codecs an export may write with (``compression=``), and the level of each.
#: Writing costs about as much as the model in an export, so the default was chosen on
#: figures measured side by side (bench/bench_export.py codec table: one 60 s clip at
#: 1024 relu hiddens, 57% exact zeros; write time relative to no compression, median
#: over alternate rounds on a shared 2-core machine, each figure varying by about
#: +-0.4): zstd level 1 without dictionary 2.3x the time for 2.02x smaller files;
#: pyarrow's default, which also tries a dictionary on the float activations (it
#: overflows and falls back to plain), 2.4x for 1.93x; zstd level 3 2.8x for 2.07x;
#: lz4 1.5x for 1.65x. Zstd level 1 is the default: at thousands of hours a dataset
#: half the size outweighs the write time; ``"none"`` is for when the disk is cheap
#: and the export must be as fast as it can be. Dictionary encoding is kept for the
#: string columns, where values repeat.
CODEC_LEVELS: dict[str, int | None] = {"zstd": 1, "lz4": None, "none": None}
COMPRESSION = "zstd"


_EVENTS_TYPE = pa.list_(pa.field("item", pa.string(), nullable=False))


def _vector_type(n_hidden: int) -> pa.DataType:
    # the items are never null: declaring so spares the Parquet writer a definition level
    # per value (one 60 s file at 1024 units, uncompressed: 74 -> 60 ms in one run)
    return pa.list_(pa.field("item", pa.float32(), nullable=False), n_hidden)


def _column_names(n_hidden: int) -> list[str]:
    width = max(4, len(str(n_hidden - 1)))
    return [f"h{j:0{width}d}" for j in range(n_hidden)]


def frame_schema(n_hidden: int, extra_columns: Sequence[str] = (), *,
                 columns: str = "vector", events: bool = False,
                 metadata: dict[bytes, bytes] | None = None) -> pa.Schema:
    """The Arrow schema of the per-frame table.

    Columns: ``source`` (string), ``frame`` (int32), ``start_s`` (float64), then
    ``features`` (fixed-size list of non-null float32, ``n_hidden`` long) for
    ``columns="vector"`` or one float32 column per hidden unit (``h0000``, ``h0001``, ...)
    for ``"wide"``, then with ``events`` an ``events`` column (list of strings: the
    labels of the annotated events covering the frame's centre, empty for background),
    then the manifest columns as strings.
    """
    fields = [pa.field("source", pa.string(), nullable=False),
              pa.field("frame", pa.int32(), nullable=False),
              pa.field("start_s", pa.float64(), nullable=False)]
    if columns == "vector":
        fields.append(pa.field("features", _vector_type(n_hidden), nullable=False))
    elif columns == "wide":
        fields.extend(pa.field(name, pa.float32(), nullable=False)
                      for name in _column_names(n_hidden))
    else:
        raise ParameterError(f"columns = {columns!r} is not one of {COLUMNS}")
    if events:
        fields.append(pa.field("events", _EVENTS_TYPE, nullable=False))
    fields.extend(pa.field(name, pa.string()) for name in extra_columns)
    return pa.schema(fields, metadata=metadata)


def clip_schema(n_hidden: int, pools: Sequence[str], extra_columns: Sequence[str] = (),
                *, metadata: dict[bytes, bytes] | None = None) -> pa.Schema:
    """The Arrow schema of the clip table: ``source``, ``n_frames``, ``duration_s``, one
    fixed-size float32 list per pooling (``mean``, ``max``, ``std``), manifest columns."""
    fields = [pa.field("source", pa.string(), nullable=False),
              pa.field("n_frames", pa.int64(), nullable=False),
              pa.field("duration_s", pa.float64(), nullable=False)]
    fields.extend(pa.field(p, _vector_type(n_hidden), nullable=False) for p in pools)
    fields.extend(pa.field(name, pa.string()) for name in extra_columns)
    return pa.schema(fields, metadata=metadata)


@dataclasses.dataclass
class ExportSummary:
    """What :func:`export` did."""

    path: Path | str
    n_files: int
    n_clips: int
    n_skipped: int
    n_frames: int
    audio_seconds: float
    wall_seconds: float
    failures: list[tuple[str, str]]
    #: annotation lines that could not be used as written, one line of text each
    event_problems: list[str] = dataclasses.field(default_factory=list)

    def line(self) -> str:
        """One-line summary for a person."""
        speed = self.audio_seconds / max(self.wall_seconds, 1e-9)
        text = (f"{self.n_clips} of {self.n_files} files exported ({self.n_skipped} already "
                f"done), {self.n_frames} frames, {self.audio_seconds / 3600:.3f} h of audio in "
                f"{self.wall_seconds:.1f} s ({speed:.0f}x realtime)")
        if self.failures:
            text += f"; {len(self.failures)} FAILED (see {store.join(str(self.path), FAILURES)})"
        return text


# ----------------------------------------------------------------------------- worker side

_PIPELINES: dict[str, FeaturePipeline] = {}


def _pipeline_key(model_path: str, checksum: str) -> str:
    return f"{model_path}|{checksum}"


def _pipeline(model_path: str, checksum: str) -> FeaturePipeline:
    key = _pipeline_key(model_path, checksum)
    if key not in _PIPELINES:
        pipe = load_pipeline(model_path)
        if pipe.checksum != checksum:
            raise ExportError(f"{model_path}: the model file changed during the export")
        _PIPELINES[key] = pipe
    return _PIPELINES[key]


def _export_task(task: dict[str, Any]) -> dict[str, Any]:
    """Worker: features of a group of clips into one part file (and its clip-table part)."""
    with single_blas_thread():
        return _export_group(task)


def _export_group(task: dict[str, Any]) -> dict[str, Any]:
    pipe = _pipeline(task["model"], task["checksum"])
    frontend = FrontEnd(pipe.config.frontend)
    n_hidden = pipe.n_features(task["layer"])
    columns, pools, extra_columns = task["columns"], task["pools"], task["extra_columns"]
    metadata = {METADATA_KEY: json.dumps({**task["metadata"],
                                          "sources": [j["source"] for j in task["jobs"]]}
                                         ).encode()}
    schema = frame_schema(n_hidden, extra_columns, columns=columns,
                          events=task["events"], metadata=metadata)
    rows_per_group = max(1024, ROW_GROUP_BYTES // (4 * n_hidden + 64))
    group = np.empty((rows_per_group, n_hidden), np.float32)
    out = store.folder(task["out"])
    part_name = f"part-{task['id']}.parquet"
    part = out.url(part_name)
    cache = FrameCache.open(task["cache"]) if task.get("cache") else None
    done: list[dict[str, Any]] = []
    failures: list[tuple[str, str]] = []
    clip_rows: list[dict[str, Any]] = []
    still_ours = functools.partial(_publishing, out, task.get("run"))
    with out.writing(part_name, guard=still_ours) as tmp:
        writer = pq.ParquetWriter(tmp, schema, **_write_options(schema, task["compression"]))
        try:
            for job in task["jobs"]:
                try:
                    stats = _export_clip(job, pipe, frontend, cache, writer, schema,
                                         group, task, part)
                except store.StoreUnreachable:
                    raise  # the network's fault, not the file's: the run stops
                except (AudioReadError, ParameterError, store.StoreError, OSError, ValueError,
                        RuntimeError) as exc:
                    reason = exc.reason if isinstance(exc, AudioReadError) else str(exc)
                    failures.append((job["source"], reason))
                    continue
                done.append({"source": job["source"], "n_frames": stats["n_frames"],
                             "duration_s": stats["duration_s"]})
                if pools:
                    clip_rows.append({"source": job["source"], "n_frames": stats["n_frames"],
                                      "duration_s": stats["duration_s"],
                                      **{p: stats[p] for p in pools},
                                      **{c: job["extra"].get(c, "") for c in extra_columns}})
            # the part lists every clip it tried; these ones are not in it and are tried
            # again (and reported again) by a re-run
            writer.add_key_value_metadata({FAILED_KEY: json.dumps(dict(failures)).encode()})
        finally:
            writer.close()
        if pools:
            _write_clip_part(out, f"{CLIPS_DIR}/{part_name}", clip_rows,
                             n_hidden, pools, extra_columns, metadata, task["compression"],
                             guard=still_ours)
    return {"id": task["id"], "done": done, "failures": failures}


PUBLISH_LOCK = ".publish"


def _publish_lock(out: store.Folder) -> contextlib.AbstractContextManager[None]:
    """Hold ``out/.publish`` (a blocking ``flock``) for the block.

    A task publishes its parts under it, and the driver takes it to change the run record
    and for its final clean-up, so a task's check of the run and its rename are one step.
    A store has no such lock: there the check and the upload are two steps, and a part
    an old run's task uploads in between is dropped by the new run's final clean-up.
    """
    return out.short_lock(PUBLISH_LOCK)


@contextlib.contextmanager
def _publishing(out: store.Folder, run: str | None) -> Iterator[None]:
    """Publish a part only for the run that owns the folder now.

    A Dask cluster finishes the tasks of a client that was killed; when the client is
    started again it chunks the remaining clips anew, so such a task's part would repeat
    clips of the new run's parts. The new run writes its own token into the run record
    (under the same lock) before it submits anything, so an old task is refused here.
    """
    with _publish_lock(out):
        try:
            current = json.loads(out.read_bytes(RECORD).decode("utf-8")).get("run")
        except (OSError, ValueError, store.StoreError):
            current = None
        if current != run:
            raise ExportError(f"{out.location}: a later export run took over this folder; "
                              "this task's part is discarded")
        yield


def _export_clip(job: dict[str, Any], pipe: FeaturePipeline, frontend: FrontEnd,
                 cache: FrameCache | None, writer: pq.ParquetWriter, schema: pa.Schema,
                 group: np.ndarray, task: dict[str, Any], part: str) -> dict[str, Any]:
    """Features of one clip into ``writer``, in row groups of ``len(group)`` rows filled
    in ``group`` (n_rows, n_features), so memory stays flat whatever the clip's length."""
    with contextlib.ExitStack() as stack:
        return _export_frames(job, pipe, frontend, cache, writer, schema, group, task, part,
                              stack)


def _export_frames(job: dict[str, Any], pipe: FeaturePipeline, frontend: FrontEnd,
                   cache: FrameCache | None, writer: pq.ParquetWriter, schema: pa.Schema,
                   group: np.ndarray, task: dict[str, Any], part: str,
                   stack: contextlib.ExitStack) -> dict[str, Any]:
    fe_cfg = frontend.config
    n_samples = [0]  # decoded samples, for the reason a clip too short gives
    if cache is not None:
        clip = job["clip"]
        frames_all = cache.clip_frames(clip)
        blocks: Iterator[np.ndarray] = (frames_all[a:a + 8192]
                                        for a in range(0, len(frames_all), 8192))
        duration = float(job["duration_s"])
    else:
        path = stack.enter_context(store.local_copy(job["path"]))  # fetched if a URL
        duration = read_info(path).duration
        audio = read_blocks(path, sr=fe_cfg.sample_rate, channel=fe_cfg.channel)
        blocks = frontend.stream(counted_blocks(audio, n_samples), fe_cfg.sample_rate)
    pools = task["pools"]
    # clip pooling statistics, gathered only when a clip table is asked for: these
    # float64 passes over every activation cost about a tenth of the model's time
    pool = ClipPool(group.shape[1]) if pools else None
    start = 0
    filled = 0

    def flush() -> None:
        # one full row group (or the clip's last rows) from the reused buffer; the
        # writer has encoded it when write_table returns, so the buffer may be refilled
        nonlocal filled, start
        if filled:
            table = _frame_table(job, group[:filled], start, frontend, schema, task)
            try:
                writer.write_table(table, row_group_size=len(group))
            except OSError as exc:  # the output's fault, never the clip's: it stops the run
                raise OutputError(part, os_reason(exc)) from None
            start += filled
            filled = 0

    for feats in pipe.stream_features(blocks, task["layer"]):
        if pool is not None:
            pool.add(feats)
        used = 0
        while used < len(feats):
            take = min(len(group) - filled, len(feats) - used)
            group[filled:filled + take] = feats[used:used + take]
            filled += take
            used += take
            if filled == len(group):
                flush()
    flush()
    if start == 0:
        raise AudioReadError(job["source"], frontend.too_short_reason(n_samples[0]))
    stats: dict[str, Any] = {"n_frames": start, "duration_s": duration}
    if pool is not None:
        stats.update({p: v.astype(np.float32) for p, v in pool.result(pools).items()})
    return stats


def _numeric_array(values: np.ndarray) -> pa.Array:
    """A zero-copy Arrow array over a 1-D numpy array of a fixed-width type.

    ``pa.array`` does the same, but its first call in a process imports pandas (when it
    is installed) to check whether the input is a pandas object: 0.3 s in every worker.
    """
    values = np.ascontiguousarray(values)
    return pa.Array.from_buffers(pa.from_numpy_dtype(values.dtype), len(values),
                                 [None, pa.py_buffer(values)])


def _string_array(values: Sequence[str]) -> pa.Array:
    """An Arrow string array built from its offsets and bytes (see :func:`_numeric_array`)."""
    encoded = [v.encode() for v in values]
    offsets = np.zeros(len(encoded) + 1, np.int32)
    np.cumsum([len(b) for b in encoded], out=offsets[1:])
    return pa.Array.from_buffers(pa.string(), len(encoded),
                                 [None, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))])


def _repeated_string(value: str, n: int) -> pa.Array:
    """``n`` copies of ``value`` as an Arrow string array, without a Python list."""
    encoded = value.encode()
    offsets = np.arange(n + 1, dtype=np.int32) * np.int32(len(encoded))
    return pa.Array.from_buffers(pa.string(), n,
                                 [None, pa.py_buffer(offsets), pa.py_buffer(encoded * n)])


def _frame_table(job: dict[str, Any], feats: np.ndarray, start: int, frontend: FrontEnd,
                 schema: pa.Schema, task: dict[str, Any]) -> pa.Table:
    n, n_hidden = feats.shape
    frame = np.arange(start, start + n, dtype=np.int32)
    columns: list[pa.Array] = [
        _repeated_string(job["source"], n),
        _numeric_array(frame),
        _numeric_array(frontend.frame_times(n, first=start)),
    ]
    feats = np.ascontiguousarray(feats, np.float32)
    if task["columns"] == "vector":
        columns.append(pa.FixedSizeListArray.from_arrays(_numeric_array(feats.reshape(-1)),
                                                         type=_vector_type(n_hidden)))
    else:
        by_unit = np.ascontiguousarray(feats.T)  # one pass, then each column is contiguous
        columns.extend(_numeric_array(by_unit[j]) for j in range(n_hidden))
    if task["events"]:
        events = [Event(job["source"], *e) for e in job.get("events", [])]
        columns.append(pa.array(frame_labels(events, frontend.frame_centres(n, first=start)),
                                type=_EVENTS_TYPE))
    columns.extend(_repeated_string(job["extra"].get(c, ""), n)
                   for c in task["extra_columns"])
    return pa.Table.from_arrays(columns, schema=schema)


def _write_options(schema: pa.Schema, compression: str = COMPRESSION) -> dict[str, Any]:
    """Codec settings for a part file of ``schema`` (see :data:`CODEC_LEVELS`).

    Min/max statistics are kept for every column a reader can filter on (source, frame,
    start_s, the extra columns, each unit of the wide columns) and left out for the list
    columns of feature vectors: a page's extremes over all units at once prune nothing,
    and leaving them out made the write of a 60 s file at 1024 units 7 % faster (zstd 1,
    medians over 11 and 21 alternate rounds, bench/bench_export.py's settings).
    """
    strings = [f.name for f in schema if pa.types.is_string(f.type)]
    filterable = [f.name for f in schema if not pa.types.is_fixed_size_list(f.type)]
    return {"compression": compression, "compression_level": CODEC_LEVELS[compression],
            "use_dictionary": strings, "write_statistics": filterable}


def _write_clip_part(out: store.Folder, name: str, rows: list[dict[str, Any]], n_hidden: int,
                     pools: Sequence[str], extra_columns: Sequence[str],
                     metadata: dict[bytes, bytes], compression: str, *,
                     guard: Callable[[], contextlib.AbstractContextManager[object]] | None = None
                     ) -> None:
    schema = clip_schema(n_hidden, pools, extra_columns, metadata=metadata)
    arrays: list[pa.Array] = [
        _string_array([r["source"] for r in rows]),
        _numeric_array(np.array([r["n_frames"] for r in rows], np.int64)),
        _numeric_array(np.array([r["duration_s"] for r in rows], np.float64))]
    for p in pools:
        # the clip statistics are float32 already
        flat = (np.concatenate([r[p] for r in rows]) if rows else np.zeros(0, np.float32))
        arrays.append(pa.FixedSizeListArray.from_arrays(_numeric_array(flat),
                                                        type=_vector_type(n_hidden)))
    arrays.extend(_string_array([r[c] for r in rows]) for c in extra_columns)
    with out.writing(name, guard=guard) as tmp:
        pq.write_table(pa.Table.from_arrays(arrays, schema=schema), tmp,
                       **_write_options(schema, compression))


# ----------------------------------------------------------------------------- driver side

def _finished_parts(out: store.Folder, checksum: str) -> tuple[set[str], set[str], list[str]]:
    """Sources already in complete parts of this model, the names of those parts, and
    parts of another model."""
    done: set[str] = set()
    names: set[str] = set()
    foreign: list[str] = []
    for part in out.names("part-*.parquet"):
        try:
            with out.reader(part) as fh:
                meta = pq.read_metadata(fh).metadata or {}
            info = json.loads(meta[METADATA_KEY])
            failed = json.loads(meta.get(FAILED_KEY, b"{}"))
        except (OSError, KeyError, ValueError, pa.ArrowException):
            foreign.append(part)
            continue
        if info.get("model_checksum") != checksum:
            foreign.append(part)
        else:
            names.add(part)
            done.update(src for src in info.get("sources", []) if src not in failed)
    return done, names, foreign


def export(
    source: str | Path,
    model: str | Path,
    out: str | Path,
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    columns: str = "vector",
    pool: Sequence[str] = (),
    compression: str = COMPRESSION,
    layer: str = "top",
    events: str | Path | None = None,
    overwrite: bool = False,
    config: Config | None = None,
    allow_outside: bool = False,
    progress: bool = False,
) -> ExportSummary:
    """Write every frame's hidden activations to a Parquet dataset.

    Parameters
    ----------
    source : str or Path
        A folder of audio, a manifest CSV, or a frame cache. Audio is decoded and framed
        with the model's own front-end configuration and band statistics, so features are
        identical whichever kind of source is given.
    model : str or Path
        A model file written by :func:`timbrel.training.train`.
    out : str or Path
        Dataset folder; created if missing.
    workers : int, optional
        Local worker processes; default: one per CPU core. Ignored with ``scheduler``.
    scheduler : str, optional
        Address of a dask.distributed scheduler (``tcp://HOST:PORT``); the same tasks run
        there. Needs the ``dask`` extra. The result is identical to the local backend.
    columns : {"vector", "wide"}, default "vector"
        One ``features`` list column, or one float32 column per hidden unit.
    pool : sequence of {"mean", "max", "std"}, default ()
        Also write a clip table (``out/_clips/``) with these poolings over each clip.
    compression : {"zstd", "lz4", "none"}, default "zstd"
        Parquet codec of the part files. Zstd (level 1) halves the size of relu
        activations; ``"none"`` writes about twice as fast and twice as large; lz4 lies
        between. Parts written with different codecs read the same.
    layer : {"top", "first", "all"}, default "top"
        Which layer's features a stacked model (``timbrel fit --on``) exports.
    events : str or Path, optional
        An annotation table, a local path or a store URL (``file onset offset label``,
        tab- or comma-separated, with or without a header; see
        :func:`timbrel.events.read_events`): adds an ``events``
        column with the labels of the events covering each frame's centre. Lines that
        cannot be used (onset at or after offset, negative times, clips the source lacks,
        events past a clip's end) are reported by line number in the summary's
        ``event_problems``; an event past the end still labels the frames it covers.
    overwrite : bool, default False
        Delete what ``out`` holds and start over. Without it, a dataset of the same model
        is resumed (finished clips are skipped) and one of another model is refused.
    config : Config, optional
        Must agree with the model's front end if given (it is refused otherwise).
    allow_outside : bool, default False
        Accept manifest paths outside the manifest's folder.
    progress : bool, default False

    Returns
    -------
    ExportSummary

    Raises
    ------
    ExportError
        If the folder holds another model's dataset, another export holds its lock, or
        the config disagrees with the model.
    timbrel._workers.Interrupted
        On Ctrl-C (or SIGTERM, as the command line turns it into one): the workers are
        stopped, temporaries removed, finished parts kept for a re-run to resume from.
    """
    t0 = time.perf_counter()
    pipe = load_pipeline(model)
    options = {"columns": columns, "pools": _checked_options(columns, compression, pool),
               "compression": compression, "layer": layer,
               "n_features": pipe.n_features(layer), "events": events is not None}
    annotations = (str(events), *read_events(events)) if events is not None else None
    _check_config(config, pipe, model)
    dest = store.output_folder(out)
    _check_only_ours(dest)  # before the lock file, so a refusal leaves the folder as it was
    dest.prepare()
    with dest.lock(error=ExportError, busy="another export is writing into this "
                   "folder (lock held); wait for it or choose another --out"):
        try:
            return _export_locked(source, model, dest, pipe, options, annotations,
                                  workers=workers, scheduler=scheduler, overwrite=overwrite,
                                  allow_outside=allow_outside, progress=progress, t0=t0)
        except KeyboardInterrupt:
            raise _interrupted(dest, pipe.checksum) from None


def _checked_options(columns: str, compression: str, pool: Sequence[str]) -> list[str]:
    """The poolings asked for, without repeats; refuse unknown columns, codec or pooling."""
    if columns not in COLUMNS:
        raise ParameterError(f"columns = {columns!r} is not one of {', '.join(COLUMNS)}")
    if compression not in CODEC_LEVELS:
        raise ParameterError(f"compression = {compression!r} is not one of "
                             f"{', '.join(CODEC_LEVELS)}")
    return check_pools(pool) if pool else []


def _check_config(config: Config | None, pipe: FeaturePipeline, model: str | Path) -> None:
    """Refuse a config whose front end differs from the model's."""
    fe = pipe.config.frontend
    if config is not None and config.frontend != fe:
        diffs = config.frontend.frame_differences(fe, ours="config", theirs="model")
        if config.frontend.context != fe.context:
            diffs.append(f"context: config {config.frontend.context}, model {fe.context}")
        raise ExportError(f"{model}: the configuration disagrees with the model's front end "
                          f"({'; '.join(diffs)}); export always frames audio as the model "
                          "was trained")


def _export_locked(source: str | Path, model: str | Path, out: store.Folder,
                   pipe: FeaturePipeline,
                   options: dict[str, Any],
                   annotations: tuple[str, list[Event], list[EventProblem]] | None, *,
                   workers: int | None, scheduler: str | None, overwrite: bool,
                   allow_outside: bool, progress: bool, t0: float) -> ExportSummary:
    """The body of :func:`export`, run while holding the dataset folder's lock."""
    done, done_parts = _prepare_folder(out, pipe, options, overwrite=overwrite)
    jobs, extra_columns, cache_path, audio_root = _jobs(source, pipe,
                                                        allow_outside=allow_outside)
    problems = _attach_events(jobs, annotations) if annotations is not None else []
    metadata = {"model_checksum": pipe.checksum, "model": store.absolute(model),
                "hidden": pipe.top.hidden, "n_hidden": options["n_features"],
                "layer": options["layer"], "frontend": dataclasses.asdict(pipe.config.frontend),
                "config": pipe.config.to_dict(), "timbrel": __version__,
                "columns": options["columns"], "pool": options["pools"],
                "events": options["events"], "audio_root": audio_root,
                "exported": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
    # a new run token: tasks of an earlier run still running on a Dask cluster (its
    # client was killed) see it and discard their parts instead of publishing them
    run = uuid.uuid4().hex
    record = {**metadata, "complete": False, "extra_columns": extra_columns, "run": run}
    with _publish_lock(out):
        _write_record(out, record)
    todo = [j for j in jobs if j["source"] not in done]
    n_workers = max(1, workers or os.cpu_count() or 1)
    tasks = [{**options, "id": _task_id(pipe.checksum, chunk), "jobs": chunk,
              "model": str(model), "checksum": pipe.checksum, "out": out.location,
              "extra_columns": extra_columns, "metadata": metadata, "cache": cache_path,
              "run": run}
             for chunk in even_chunks(todo, n_workers, most=FILES_PER_TASK)]
    # forked workers inherit the loaded model instead of reading it again
    _PIPELINES[_pipeline_key(str(model), pipe.checksum)] = pipe
    n_frames, seconds, failures = _run_tasks(tasks, scheduler=scheduler, workers=n_workers,
                                             n_jobs=len(jobs), n_skipped=len(jobs) - len(todo),
                                             progress=progress, t0=t0)
    with _publish_lock(out):
        _drop_parts_of_other_runs(out, keep=done_parts | {f"part-{t['id']}.parquet"
                                                          for t in tasks})
    _write_failures(out, failures)
    finished, _, _ = _finished_parts(out, pipe.checksum)
    record.update(complete=True, n_sources=len(finished), finished_sources=sorted(finished))
    _write_record(out, record)
    return ExportSummary(path=out.where, n_files=len(jobs), n_clips=len(todo) - len(failures),
                         n_skipped=len(jobs) - len(todo), n_frames=n_frames,
                         audio_seconds=seconds, wall_seconds=time.perf_counter() - t0,
                         failures=sorted(failures.items()), event_problems=problems)


def _attach_events(jobs: list[dict[str, Any]],
                   annotations: tuple[str, list[Event], list[EventProblem]]) -> list[str]:
    """Give each job its clip's events; the annotation lines that cannot be used, as text."""
    table, events, problems = annotations
    durations = {j["source"]: float(j["duration_s"]) if "duration_s" in j
                 else _duration(j["path"]) for j in jobs}
    by_clip, more = check_events(events, durations)
    for job in jobs:
        job["events"] = [(e.onset, e.offset, e.label) for e in by_clip.get(job["source"], [])]
    return [p.text(table) for p in sorted([*problems, *more], key=lambda p: p.line)]


def _prepare_folder(out: store.Folder, pipe: FeaturePipeline, options: dict[str, Any], *,
                    overwrite: bool) -> tuple[set[str], set[str]]:
    """Clear or check what ``out`` holds; return the sources and part names already done."""
    _check_only_ours(out)
    if overwrite:
        _clear(out)
    if options["pools"]:
        out.prepare(CLIPS_DIR)
    out.clean_temporaries(CLIPS_DIR)
    _drop_orphan_clip_parts(out)
    record = _read_record(out)
    if record and record.get("model_checksum") != pipe.checksum:
        raise ExportError(f"{out.location}: holds a dataset of another model "
                          f"({record.get('model', '?')}); pass --overwrite to replace it")
    if record:
        # records written before the options were named so say "layout" for the columns
        theirs = {"columns": record.get("columns", record.get("layout")),
                  "pool": record.get("pool"), "layer": record.get("layer", "top"),
                  "events": bool(record.get("events", False))}
        ours = {"columns": options["columns"], "pool": options["pools"],
                "layer": options["layer"], "events": options["events"]}
        if theirs != ours:
            differ = ", ".join(f"{k} {theirs[k]!r}" for k in ours if theirs[k] != ours[k])
            raise ExportError(f"{out.location}: holds a dataset written with {differ}; use "
                              "the same options or --overwrite")
    done, done_parts, foreign = _finished_parts(out, pipe.checksum)
    if foreign:
        raise ExportError(f"{out.location}: holds part files of another model ({foreign[0]}); "
                          "pass --overwrite to replace them")
    return done, done_parts


def _run_tasks(tasks: list[dict[str, Any]], *, scheduler: str | None, workers: int,
               n_jobs: int, n_skipped: int, progress: bool, t0: float
               ) -> tuple[int, float, dict[str, str]]:
    """Run the export tasks locally or on Dask; frames, audio seconds and failures."""
    failures: dict[str, str] = {}
    n_frames = 0
    seconds = 0.0
    # the local pool starts before the progress bar's thread, so it can be forked
    with (dask_results(_export_task, tasks, scheduler, key=lambda t: f"timbrel-export-{t['id']}",
                       error=ExportError) if scheduler
          else task_results(_export_task, tasks, workers, preload=[__name__])) as results, \
            progress_bar(progress) as bar:
        task_id = bar.add_task("export", total=n_jobs, info="")
        bar.advance(task_id, n_skipped)
        for result in results:
            for d in result["done"]:
                n_frames += d["n_frames"]
                seconds += d["duration_s"]
            failures.update(result["failures"])
            bar.advance(task_id, len(result["done"]) + len(result["failures"]))
            elapsed = max(time.perf_counter() - t0, 1e-9)
            bar.update(task_id, info=f"{n_frames / elapsed:.0f} frames/s, "
                       f"{seconds / 3600 / elapsed * 3600:.2f} audio-h/h")
    return n_frames, seconds, failures


def _drop_parts_of_other_runs(out: store.Folder, *, keep: set[str]) -> None:
    """Delete parts neither done before this run nor written by it, and temporaries.

    Such a part comes from a task of an earlier run that was still running when this
    run looked at the folder (a Dask client killed and started again: the cluster
    finishes what it had started). Every clip it holds is also in a part kept here. A
    clip-table part goes too when its frame part was never published (the old task
    was refused, or its temporary removed, between the two).
    """
    for part in [*out.names("part-*.parquet"), *out.names(f"{CLIPS_DIR}/part-*.parquet")]:
        if posixpath.basename(part) not in keep:
            out.remove(part)
    out.clean_temporaries(CLIPS_DIR)


def _interrupted(out: store.Folder, checksum: str) -> Interrupted:
    """What a stopped run leaves: finished parts kept, temporaries removed.

    The local workers have already ended (:func:`timbrel._workers.task_results`)."""
    out.clean_temporaries(CLIPS_DIR)
    _drop_orphan_clip_parts(out)
    done, parts, _ = _finished_parts(out, checksum)
    return Interrupted(f"{out.location}: interrupted; {len(done)} files in {len(parts)} finished "
                       "parts are kept, partial parts removed; run the same command again "
                       "to continue")


def _audio_root(source: str | Path) -> str:
    """Folder that clip names are relative to: the folder itself, or a manifest's folder."""
    if store.is_url(source):
        text = str(source).rstrip("/")
        return store.parent(text) if text.lower().endswith(".csv") else text
    path = store.local(source)
    return os.fsdecode((path if path.is_dir() else path.parent).absolute())


def _duration(path: str | Path) -> float:
    """Seconds of audio of a file (fetched first if a URL)."""
    with store.local_copy(path) as local:
        return read_info(local).duration


def _is_cache(source: str | Path) -> bool:
    if store.is_url(source):
        return store.exists(store.join(str(source), CACHE_MARKER))
    src = store.local(source)
    return src.is_dir() and (src / CACHE_MARKER).is_file()


def _jobs(source: str | Path, pipe: FeaturePipeline, *, allow_outside: bool
          ) -> tuple[list[dict[str, Any]], list[str], str | None, str]:
    src = source if store.is_url(source) else store.local(source)
    if _is_cache(src):
        cache = FrameCache.open(src)
        diffs = pipe.config.frontend.frame_differences(cache.config.frontend, ours="model",
                                                       theirs="cache")
        if diffs:
            raise ExportError(f"{src}: the cache's frames were made with other front-end "
                              f"settings than the model's ({'; '.join(diffs)}); export from "
                              "the audio instead")
        extra = cache.extra_columns
        table = cache.index.to_pylist()
        jobs = [{"source": row["source"], "clip": i, "duration_s": row["duration_s"],
                 "extra": {c: row.get(c) or "" for c in extra}} for i, row in enumerate(table)]
        return jobs, extra, store.absolute(src), _audio_root(cache.marker["source"])
    items, extra = discover(src, allow_outside=allow_outside)
    return [_job(item) for item in items], extra, None, _audio_root(src)


def _job(item: AudioItem) -> dict[str, Any]:
    return {"source": item.source, "path": os.fsdecode(item.path), "extra": dict(item.extra)}


def _task_id(checksum: str, chunk: list[dict[str, Any]]) -> str:
    h = hashlib.sha256(checksum.encode())
    for job in chunk:
        h.update(job["source"].encode("utf-8", "surrogateescape") + b"\0")
    return h.hexdigest()[:16]


def _drop_orphan_clip_parts(out: store.Folder) -> None:
    # a clip part is published just before its frame part; one without a frame part is
    # from a task killed in between, and that task's clips will be exported again
    for clip_part in out.names(f"{CLIPS_DIR}/part-*.parquet"):
        if out.size(posixpath.basename(clip_part)) is None:
            out.remove(clip_part)


def _read_record(out: store.Folder) -> dict[str, Any] | None:
    if out.size(RECORD) is None:
        return None
    try:
        return json.loads(out.read_bytes(RECORD).decode("utf-8"))
    except (OSError, ValueError):
        raise ExportError(f"{out.url(RECORD)}: unreadable run record; pass --overwrite to "
                          "start over") from None


def _write_record(out: store.Folder, record: dict[str, Any]) -> None:
    with out.writing(RECORD) as tmp:
        tmp.write_text(json.dumps(record, indent=1), encoding="utf-8")


def _write_failures(out: store.Folder, failures: dict[str, str]) -> None:
    with out.writing(FAILURES) as tmp, open(tmp, "w", encoding="utf-8", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["source", "reason"])
        for src, reason in sorted(failures.items()):
            writer.writerow([display_name(src), reason])


def _ours(name: str) -> bool:
    """Whether a dataset folder entry is one timbrel writes."""
    return (name in (RECORD, FAILURES, CLIPS_DIR, LOCK_NAME)
            or fnmatch.fnmatch(name, "part-*.parquet")
            or (name.startswith(".") and name.endswith(TEMP_SUFFIX)))


def _check_only_ours(out: store.Folder) -> None:
    """Refuse a folder holding files timbrel did not write: Parquet readers would take them
    for part of the dataset, and --overwrite must never delete them."""
    # names starting with "." or "_" are skipped by dataset readers and left alone
    foreign = [name for name in out.entries()
               if not _ours(name) and not name.startswith((".", "_"))]
    if foreign:
        shown = ", ".join(foreign[:3]) + (", ..." if len(foreign) > 3 else "")
        raise ExportError(f"{out.location}: holds files that are not part of a timbrel dataset "
                          f"({shown}); choose an empty or new folder")


def _clear(out: store.Folder) -> None:
    """Delete the dataset in ``out``: only the entries timbrel writes."""
    for part in out.names(f"{CLIPS_DIR}/part-*.parquet"):
        out.remove(part)
    out.clean_temporaries(CLIPS_DIR)
    for name in out.entries():
        if name == CLIPS_DIR:
            if isinstance(out, store.LocalFolder):
                with contextlib.suppress(OSError):
                    out.file(CLIPS_DIR).rmdir()  # kept if something else is in it
        elif name != LOCK_NAME and _ours(name) and out.size(name) is not None:
            out.remove(name)
