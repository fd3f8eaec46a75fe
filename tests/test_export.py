"""Tests of timbrel.export, read back with outside readers (pyarrow.dataset, DuckDB, pandas)."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import duckdb
import numpy as np
import pandas as pd
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest
import soundfile as sf

from timbrel import ExportError, ParameterError
from timbrel.audio import load
from timbrel.cache import build_cache
from timbrel.config import load_config
from timbrel.export import export
from timbrel.frontend import FrontEnd
from timbrel.pipeline import load_pipeline
from timbrel.training import train

N_HIDDEN = 20


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("export")
    clips = root / "clips"
    clips.mkdir()
    rng = np.random.default_rng(9)
    rows = ["path,label,split"]
    for i in range(10):
        sr = (16000, 22050)[i % 2]
        seconds = 0.4 + 0.1 * i
        y = 0.2 * rng.standard_normal(int(sr * seconds))
        sf.write(clips / f"s{i:02d}.wav", y.astype(np.float32), sr)
        rows.append(f"clips/s{i:02d}.wav,{'ab'[i % 2]},{'train' if i < 7 else 'test'}")
    (clips / "broken.wav").write_bytes(b"RIFF nonsense")
    rows.append("clips/broken.wav,a,train")
    manifest = root / "manifest.csv"
    manifest.write_text("\n".join(rows) + "\n")
    config = load_config(overrides=["frontend.n_mels=12", "frontend.context=2",
                                    f"model.n_hidden={N_HIDDEN}", "model.epochs=2",
                                    "model.seed=4"])
    build_cache(manifest, root / "cache", config=config, workers=1)
    train(root / "cache", root / "model.npz", config=config)
    return {"root": root, "manifest": manifest, "cache": root / "cache",
            "model": root / "model.npz"}


def _sorted_table(path):
    table = pads.dataset(path).to_table()  # outside reader: pyarrow.dataset
    return table.sort_by([("source", "ascending"), ("frame", "ascending")])


def _features(table):
    return np.stack(table.column("features").to_numpy(zero_copy_only=False))


def test_rows_equal_in_process_transform_and_predicted_counts(tmp_path, setup):
    out = tmp_path / "ds"
    summary = export(setup["manifest"], setup["model"], out, workers=1)
    assert summary.n_clips == 10 and [s for s, _ in summary.failures] == ["clips/broken.wav"]
    table = _sorted_table(out)
    pipe = load_pipeline(setup["model"])
    fe = FrontEnd(pipe.config.frontend)
    for source in sorted(set(table.column("source").to_pylist())):
        rows = table.filter(pads.field("source") == source)
        y = load(setup["root"] / source, sr=16000)
        expected = pipe.features(fe.frames(y, 16000))
        np.testing.assert_allclose(_features(rows), expected, atol=1e-6)
        assert rows.column("frame").to_pylist() == list(range(len(expected)))
        np.testing.assert_allclose(rows.column("start_s").to_numpy(),
                                   np.arange(len(expected)) * 160 / 16000)
        assert len(expected) == fe.n_frames(y.size)
    assert table.schema.field("features").type.list_size == N_HIDDEN
    meta = json.loads(table.schema.metadata[b"timbrel"])
    assert meta["model_checksum"] == pipe.checksum and meta["hidden"] == "relu"
    assert meta["frontend"]["n_mels"] == 12


def test_duckdb_and_pandas_read_the_dataset(tmp_path, setup):
    out = tmp_path / "ds"
    export(setup["manifest"], setup["model"], out, workers=2)
    # outside reader: DuckDB SQL over the part files
    counts = dict(duckdb.sql(f"select source, count(*) from read_parquet('{out}/*.parquet') "
                             "group by source").fetchall())
    pipe = load_pipeline(setup["model"])
    fe = FrontEnd(pipe.config.frontend)
    for source, n in counts.items():
        assert n == fe.n_frames(load(setup["root"] / source, sr=16000).size)
    # outside reader: pandas through pyarrow
    frame = pd.read_parquet(out)
    assert len(frame) == sum(counts.values())
    assert set(frame["label"]) == {"a", "b"} and set(frame["split"]) == {"train", "test"}


def test_cache_source_gives_identical_features(tmp_path, setup):
    export(setup["manifest"], setup["model"], tmp_path / "a", workers=1)
    export(setup["cache"], setup["model"], tmp_path / "b", workers=2)
    a, b = _sorted_table(tmp_path / "a"), _sorted_table(tmp_path / "b")
    assert a.column("source").to_pylist() == b.column("source").to_pylist()
    np.testing.assert_array_equal(_features(a), _features(b))
    assert a.column("label").to_pylist() == b.column("label").to_pylist()


def test_wide_columns_and_clip_table(tmp_path, setup):
    out = tmp_path / "wide"
    export(setup["cache"], setup["model"], out, workers=1, columns="wide",
           pool=["mean", "max", "std"])
    table = _sorted_table(out)
    names = [f"h{j:04d}" for j in range(N_HIDDEN)]
    assert table.column_names[3:3 + N_HIDDEN] == names
    wide = np.column_stack([table.column(n).to_numpy() for n in names])
    export(setup["cache"], setup["model"], tmp_path / "vec", workers=1)
    np.testing.assert_array_equal(wide, _features(_sorted_table(tmp_path / "vec")))
    clips = pads.dataset(out / "_clips").to_table().sort_by("source")
    assert clips.num_rows == 10
    first = table.filter(pads.field("source") == clips.column("source")[0].as_py())
    feats = np.column_stack([first.column(n).to_numpy() for n in names])
    np.testing.assert_allclose(clips.column("mean")[0].values.to_numpy(), feats.mean(0),
                               rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(clips.column("max")[0].values.to_numpy(), feats.max(0))
    np.testing.assert_allclose(clips.column("std")[0].values.to_numpy(), feats.std(0),
                               rtol=1e-3, atol=1e-5)


@pytest.mark.parametrize(("compression", "parquet_codec"),
                         [("zstd", "ZSTD"), ("lz4", "LZ4"), ("none", "UNCOMPRESSED")])
def test_every_codec_gives_the_same_rows(tmp_path, setup, compression, parquet_codec):
    reference = tmp_path / "reference"
    export(setup["cache"], setup["model"], reference, workers=1)
    out = tmp_path / compression
    export(setup["cache"], setup["model"], out, workers=1, compression=compression,
           pool=["mean"])
    np.testing.assert_array_equal(_features(_sorted_table(out)),
                                  _features(_sorted_table(reference)))
    parts = sorted(out.glob("part-*.parquet")) + sorted((out / "_clips").glob("*.parquet"))
    for part in parts:  # the codec as Parquet's own footer names it
        meta = pq.ParquetFile(part).metadata
        codecs = {meta.row_group(g).column(c).compression
                  for g in range(meta.num_row_groups) for c in range(meta.num_columns)}
        assert codecs == {parquet_codec}
    # the activations are never null, and the schema says so
    item = _sorted_table(out).schema.field("features").type.value_field
    assert item.type == "float" and not item.nullable


@pytest.mark.parametrize("columns", ["vector", "wide"])
def test_statistics_kept_where_a_reader_can_filter(tmp_path, setup, columns):
    out = tmp_path / columns
    export(setup["cache"], setup["model"], out, workers=1, columns=columns, pool=["max"])
    for part in sorted(out.glob("part-*.parquet")) + sorted((out / "_clips").glob("*.parquet")):
        meta = pq.ParquetFile(part).metadata.row_group(0)
        stats = {meta.column(c).path_in_schema: meta.column(c).is_stats_set
                 for c in range(meta.num_columns)}
        # per-column min/max let DuckDB and pyarrow skip row groups on these filters
        assert stats["source"]
        assert all(stats[p] for p in stats if p.startswith(("frame", "start_s", "h0")))
        # a vector column's extremes over all units prune nothing, so none is written
        assert not any(stats[p] for p in stats if p.endswith(".list.element"))
    # outside reader: DuckDB, which checks a filter against row-group statistics before
    # reading (common practice in Parquet readers), finds exactly that clip's rows
    (n_one,), = duckdb.sql(f"select count(*) from read_parquet('{out}/part-*.parquet') "
                           "where source = 'clips/s03.wav'").fetchall()
    table = _sorted_table(out)
    assert n_one == table.filter(pads.field("source") == "clips/s03.wav").num_rows > 0


def test_an_export_never_imports_pandas(tmp_path, setup):
    # pyarrow's pa.array imports pandas on its first call (0.3 s in every worker
    # process); the export builds its columns from buffers instead. A property that
    # keeps workers fast, checked in a fresh interpreter, never a duration.
    script = ("import sys\n"
              "from timbrel.export import export\n"
              f"export({str(setup['manifest'])!r}, {str(setup['model'])!r}, "
              f"{str(tmp_path / 'ds')!r}, workers=1, pool=['mean'])\n"
              "print('pandas' in sys.modules)\n")
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                            check=True)
    assert result.stdout.strip() == "False"
    assert pads.dataset(tmp_path / "ds").count_rows() > 0


def test_unknown_codec_is_refused_before_anything_is_written(tmp_path, setup):
    with pytest.raises(ParameterError, match="compression = 'gzip'"):
        export(setup["cache"], setup["model"], tmp_path / "ds", compression="gzip")
    assert not (tmp_path / "ds").exists()


def test_rerun_skips_finished_sources_and_other_models_are_refused(tmp_path, setup):
    out = tmp_path / "ds"
    export(setup["cache"], setup["model"], out, workers=1)
    again = export(setup["cache"], setup["model"], out, workers=1)
    assert again.n_skipped == 10 and again.n_frames == 0
    other = tmp_path / "other.npz"
    config = load_pipeline(setup["model"]).config.with_overrides(["model.seed=99"])
    train(setup["cache"], other, config=config)
    with pytest.raises(ExportError, match="another model"):
        export(setup["cache"], other, out, workers=1)
    summary = export(setup["cache"], other, out, workers=1, overwrite=True)
    assert summary.n_clips == 10
    assert len(_sorted_table(out)) == _sorted_table(tmp_path / "ds").num_rows


def test_config_that_disagrees_with_the_model_is_refused(tmp_path, setup):
    config = load_config()
    with pytest.raises(ExportError,
                       match=f"n_mels: config {config.frontend.n_mels}, model 12"):
        export(setup["manifest"], setup["model"], tmp_path / "x", config=config)


def test_second_concurrent_export_is_refused_by_the_lock(tmp_path, setup):
    import fcntl

    out = tmp_path / "ds"
    out.mkdir()
    with open(out / ".lock", "a+") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)  # as a running export holds it
        with pytest.raises(ExportError, match="lock held"):
            export(setup["cache"], setup["model"], out, workers=1)


def test_killed_export_resumes_with_every_frame_exactly_once(tmp_path, setup):
    out = tmp_path / "ds"
    script = (
        "import sys, time\n"
        "import timbrel.export as ex\n"
        "ex.FILES_PER_TASK = 1\n"
        "original = ex._export_clip\n"
        "def slow(*a, **k):\n"
        "    time.sleep(0.4)\n"
        "    return original(*a, **k)\n"
        "ex._export_clip = slow\n"
        "ex.export(sys.argv[1], sys.argv[2], sys.argv[3], workers=1)\n")
    proc = subprocess.Popen([sys.executable, "-c", script, str(setup["manifest"]),
                             str(setup["model"]), str(out)])
    deadline = time.time() + 60
    while time.time() < deadline and len(list(out.glob("part-*.parquet"))) < 3:
        time.sleep(0.05)
    os.kill(proc.pid, signal.SIGKILL)  # a real kill, mid-export
    proc.wait()
    n_before = len(list(out.glob("part-*.parquet")))
    assert 3 <= n_before < 11
    summary = export(setup["manifest"], setup["model"], out, workers=1)
    assert summary.n_skipped >= 3
    table = _sorted_table(out)
    reference = tmp_path / "clean"
    export(setup["manifest"], setup["model"], reference, workers=1)
    clean = _sorted_table(reference)
    keys = list(zip(table.column("source").to_pylist(), table.column("frame").to_pylist(),
                    strict=True))
    assert len(keys) == len(set(keys)) == clean.num_rows
    np.testing.assert_array_equal(_features(table), _features(clean))
    assert not [p for p in out.iterdir() if p.name.endswith(".part")]


def test_parts_an_old_run_publishes_mid_run_never_stay(tmp_path, setup, monkeypatch):
    # A Dask client killed and started again: the cluster still runs the old client's
    # tasks. One of them may publish its clip-table part and then lose its frame part
    # (refused, or its temporary removed by the new run), or publish both before the new
    # run's token lands. Planted here at the new run's first clip, as such a task would.
    import shutil

    import timbrel.export as ex

    clean = tmp_path / "clean"
    export(setup["cache"], setup["model"], clean, workers=1, pool=["mean"])
    clip_part = next((clean / "_clips").glob("part-*.parquet"))
    frame_part = clean / clip_part.name
    out = tmp_path / "ds"
    original = ex._export_clip
    planted = []

    def export_clip(*args, **kwargs):
        if not planted:
            shutil.copy(clip_part, out / "_clips" / "part-0000000000000000.parquet")
            shutil.copy(clip_part, out / "_clips" / "part-1111111111111111.parquet")
            shutil.copy(frame_part, out / "part-1111111111111111.parquet")
            planted.append(True)
        return original(*args, **kwargs)

    monkeypatch.setattr(ex, "_export_clip", export_clip)
    export(setup["cache"], setup["model"], out, workers=1, pool=["mean"])
    assert planted
    clips = sorted(p.name for p in (out / "_clips").glob("part-*.parquet"))
    assert clips == sorted(p.name for p in out.glob("part-*.parquet"))
    assert _sorted_table(out).equals(_sorted_table(clean))
    ours = pads.dataset(out / "_clips").to_table().sort_by("source")
    assert ours.equals(pads.dataset(clean / "_clips").to_table().sort_by("source"))


def test_a_replaced_run_cannot_publish(tmp_path, setup):
    import threading

    from timbrel._atomic import atomic_path
    from timbrel.export import RECORD, _publish_lock, _publishing
    from timbrel.store import LocalFolder

    out = tmp_path / "ds"
    export(setup["cache"], setup["model"], out, workers=1)
    folder = LocalFolder(out)
    run = json.loads((out / RECORD).read_text())["run"]
    with pytest.raises(ExportError, match="a later export run took over"):
        with atomic_path(out / "late.bin", guard=lambda: _publishing(folder, "an-old-run")) as t:
            t.write_bytes(b"x")
    assert not (out / "late.bin").exists()
    assert not [p for p in out.iterdir() if p.name.endswith(".part")]
    # while the driver holds the publish lock (to swap the run token), a task of the
    # current run waits for it, then publishes
    published = threading.Event()

    def publish():
        with atomic_path(out / "ok.bin", guard=lambda: _publishing(folder, run)) as t:
            t.write_bytes(b"x")
        published.set()

    with _publish_lock(folder):
        worker = threading.Thread(target=publish)
        worker.start()
        assert not published.wait(0.5)
        assert not (out / "ok.bin").exists()
    worker.join(10)
    assert published.is_set() and (out / "ok.bin").read_bytes() == b"x"


def test_dask_cluster_gives_the_same_dataset(tmp_path, setup):
    distributed = pytest.importorskip("distributed")
    export(setup["manifest"], setup["model"], tmp_path / "local", workers=2)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        export(setup["manifest"], setup["model"], tmp_path / "dask",
               scheduler=cluster.scheduler_address)
    a, b = _sorted_table(tmp_path / "local"), _sorted_table(tmp_path / "dask")
    assert a.column("source").to_pylist() == b.column("source").to_pylist()
    np.testing.assert_array_equal(_features(a), _features(b))
    assert pq.read_schema(next((tmp_path / "dask").glob("part-*.parquet"))).metadata


def test_long_clip_fills_whole_row_groups_in_order(tmp_path, setup, monkeypatch):
    # a clip longer than a row group is cut into full groups and a last partial one,
    # and its rows still equal the in-process transform, frame by frame
    import timbrel.export as export_module

    monkeypatch.setattr(export_module, "ROW_GROUP_BYTES", 1)  # the 1024-row floor
    audio = tmp_path / "long"
    audio.mkdir()
    y = 0.2 * np.random.default_rng(5).standard_normal(16000 * 25)  # 2498 frames
    sf.write(audio / "long.wav", y.astype(np.float32), 16000)
    out = tmp_path / "ds"
    export(audio, setup["model"], out, workers=1)
    part = next(out.glob("part-*.parquet"))
    metadata = pq.ParquetFile(part).metadata  # outside reader: pyarrow's Parquet footer
    pipe = load_pipeline(setup["model"])
    fe = FrontEnd(pipe.config.frontend)
    expected = pipe.features(fe.frames(load(audio / "long.wav", sr=16000), 16000))
    sizes = [metadata.row_group(i).num_rows for i in range(metadata.num_row_groups)]
    assert sizes == [1024, 1024, len(expected) - 2048]
    table = _sorted_table(out)
    assert table.column("frame").to_pylist() == list(range(len(expected)))
    np.testing.assert_allclose(_features(table), expected, atol=1e-6)
