"""Sources and outputs in an object store, processed on a Dask cluster.

The store is a real S3-compatible server (moto's server mode, ``tests/_s3server.py``)
on loopback, reached through s3fs and botocore exactly as a hosted store is; the
cluster is a loopback ``distributed.LocalCluster`` of worker processes. The audio is
spoken words synthesised by espeak-ng (Debian), see ``tests/speech_corpus.py``. What
the store's objects hold is read back with boto3 and pyarrow, outside timbrel.
"""

from __future__ import annotations

import csv
import json
import os
import re
import shutil
import subprocess
import sys

import numpy as np
import pyarrow.dataset as pads
import pytest

import _s3server
from timbrel import ParameterError
from timbrel.cache import FrameCache, build_cache
from timbrel.config import load_config
from timbrel.evaluation import probe
from timbrel.export import export
from timbrel.model import read_model_file
from timbrel.store import StoreError
from timbrel.training import train

pytestmark = pytest.mark.speech

BUCKET = "timbrel-test"
N_CLIPS = 24
OVERRIDES = ["frontend.n_mels=20", "frontend.context=2", "model.n_hidden=32",
             "model.epochs=2", "model.seed=3"]


@pytest.fixture(scope="module")
def s3():
    """The server's environment (credentials and endpoint), set for this process and the
    processes it starts; a bucket made."""
    with _s3server.start() as env, pytest.MonkeyPatch.context() as mp:
        for key, value in env.items():
            mp.setenv(key, value)
        _s3server.make_bucket(env, BUCKET)
        yield env
        import s3fs

        s3fs.S3FileSystem.clear_instance_cache()


@pytest.fixture(scope="module")
def words(spoken_words, tmp_path_factory):
    """A small folder of spoken words with its manifest, and one file that is no audio."""
    root = tmp_path_factory.mktemp("words")
    with open(spoken_words, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))[::20][:N_CLIPS]
    for row in rows:
        (root / row["path"]).parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(spoken_words.parent / row["path"], root / row["path"])
    (root / "clips" / "broken.wav").write_bytes(b"RIFF this is not audio")
    rows.append({**rows[0], "path": "clips/broken.wav"})
    with open(root / "manifest.csv", "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return root


@pytest.fixture(scope="module")
def cluster(s3):
    """A loopback Dask cluster of two worker processes (started after the store's
    environment is set, so the workers reach the store too)."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as c:
        yield c.scheduler_address


def _dataset(source, **kwargs):
    table = pads.dataset(source, format="parquet", **kwargs).to_table()
    return table.sort_by([("source", "ascending"), ("frame", "ascending")])


def test_the_store_chain_on_a_cluster_equals_the_local_chain(s3, words, cluster, tmp_path):
    config = load_config(overrides=OVERRIDES)
    # all local, local processes
    local = tmp_path / "local"
    build_cache(words / "manifest.csv", local / "cache", config=config, workers=2)
    train(local / "cache", local / "model.npz", config=config)
    export(words / "manifest.csv", local / "model.npz", local / "ds", workers=2, pool=["mean"])
    # store to store, every stage that reads the audio on the cluster
    _s3server.upload_folder(s3, str(words), f"s3://{BUCKET}/words")
    base = f"s3://{BUCKET}/run"
    summary = build_cache(f"s3://{BUCKET}/words/manifest.csv", f"{base}/cache", config=config,
                          scheduler=cluster)
    assert (summary.n_clips, summary.n_failed) == (N_CLIPS, 1)
    train(f"{base}/cache", f"{base}/model.npz", config=config)
    export(f"s3://{BUCKET}/words/manifest.csv", f"{base}/model.npz", f"{base}/ds",
           scheduler=cluster, pool=["mean"])

    objects = _s3server.object_bytes(s3, base)
    # the cache: the same frames of every clip and the same band statistics
    ours, theirs = FrameCache.open(f"{base}/cache"), FrameCache.open(local / "cache")
    assert ours.index.column("source").to_pylist() == theirs.index.column("source").to_pylist()
    for clip in range(len(theirs)):
        np.testing.assert_array_equal(ours.clip_frames(clip), theirs.clip_frames(clip))
    marker = json.loads(objects["cache/cache.json"])
    assert marker["band_stats"] == theirs.marker["band_stats"]
    assert b"broken.wav" in objects["cache/failures.csv"]
    # the model, trained by streaming the cache from the store: the same parameters
    (tmp_path / "fetched.npz").write_bytes(objects["model.npz"])
    a, b = read_model_file(tmp_path / "fetched.npz"), read_model_file(local / "model.npz")
    for name in ("weights_", "hidden_bias_", "visible_bias_", "sigma_"):
        np.testing.assert_array_equal(getattr(a.rbm, name), getattr(b.rbm, name))
    assert "model.npz.history.csv" in objects
    # the dataset, read with pyarrow's own S3 file system: the same rows
    from pyarrow import fs as pafs

    s3fs_arrow = pafs.S3FileSystem(endpoint_override=s3["AWS_ENDPOINT_URL_S3"],
                                   access_key=s3["AWS_ACCESS_KEY_ID"],
                                   secret_key=s3["AWS_SECRET_ACCESS_KEY"], region="us-east-1")
    remote = _dataset(f"{BUCKET}/run/ds", filesystem=s3fs_arrow)
    mine = _dataset(local / "ds")
    assert remote.num_rows == mine.num_rows > 0
    for column in ("source", "frame", "features"):
        assert remote.column(column).equals(mine.column(column)), column
    clips = pads.dataset(f"{BUCKET}/run/ds/_clips", filesystem=s3fs_arrow).to_table()
    assert clips.num_rows == N_CLIPS
    record = json.loads(objects["ds/_export.json"])
    assert record["complete"] and record["n_sources"] == N_CLIPS
    # the probe reads the dataset and (for its MFCC peer) the audio from the store
    there, here = (probe(ds, baselines=["mfcc"], label="label", split_column="split")
                   for ds in (f"{base}/ds", local / "ds"))
    assert [(s.name, s.accuracy) for s in there.scores] == [
        (s.name, s.accuracy) for s in here.scores]


def test_a_rerun_reuses_what_the_store_holds(s3, words, tmp_path):
    config = load_config(overrides=OVERRIDES)
    _s3server.upload_folder(s3, str(words), f"s3://{BUCKET}/again/words")
    source, out = f"s3://{BUCKET}/again/words/manifest.csv", f"s3://{BUCKET}/again/cache"
    first = build_cache(source, out, config=config, workers=1)
    second = build_cache(source, out, config=config, workers=1)
    assert (first.n_reused, second.n_reused) == (0, N_CLIPS)
    model = tmp_path / "m.npz"
    train(out, model, config=config)
    ds = f"s3://{BUCKET}/again/ds"
    done = export(out, model, ds, workers=1)
    again = export(out, model, ds, workers=1)
    assert (done.n_skipped, again.n_skipped) == (0, N_CLIPS)


def _cli(*args, env):
    return subprocess.run([sys.executable, "-m", "timbrel", *args], capture_output=True,
                          text=True, env=env, timeout=300)


def test_a_missing_bucket_is_one_line(s3, words):
    run = _cli("frames", str(words), "--out", "s3://no-such-bucket/cache", "--quiet",
               env=os.environ)
    assert run.returncode == 1
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and "s3://no-such-bucket/cache" in lines[0], run.stderr
    assert "no such bucket" in lines[0]


def test_missing_credentials_are_one_line(s3, words, tmp_path):
    env = {k: v for k, v in os.environ.items() if not k.startswith("AWS_")}
    env.update(AWS_ENDPOINT_URL_S3=s3["AWS_ENDPOINT_URL_S3"], AWS_DEFAULT_REGION="us-east-1",
               AWS_SHARED_CREDENTIALS_FILE=str(tmp_path / "none"),
               AWS_CONFIG_FILE=str(tmp_path / "none"), AWS_EC2_METADATA_DISABLED="true")
    run = _cli("frames", str(words), "--out", f"s3://{BUCKET}/nocreds", "--quiet", env=env)
    assert run.returncode == 1
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and "no credentials" in lines[0], run.stderr


def test_an_annotation_table_in_the_store_reads_as_the_local_one(s3, tmp_path):
    from timbrel.events import read_events

    table = tmp_path / "events.tsv"
    table.write_text("a.wav\t0.5\t1.5\tdog\na.wav\t2.0\t1.0\tcar\nb.wav\t0\t3\tcar\n")
    _s3server.upload_folder(s3, str(tmp_path), f"s3://{BUCKET}/tables")
    assert read_events(f"s3://{BUCKET}/tables/events.tsv") == read_events(table)
    with pytest.raises(ParameterError, match=rf"s3://{BUCKET}/tables/nope.tsv: cannot read"):
        read_events(f"s3://{BUCKET}/tables/nope.tsv")


def test_a_missing_object_is_not_called_a_missing_bucket(s3):
    # the bucket's name holds the word "bucket": the reason must come from the error, not
    # from the name (it once said "no such bucket" for a missing object here)
    from timbrel.store import read_bytes

    _s3server.make_bucket(s3, "my-bucket-of-tables")
    with pytest.raises(StoreError, match=r"s3://my-bucket-of-tables/none.tsv: cannot read: "
                                         r"no such object$"):
        read_bytes("s3://my-bucket-of-tables/none.tsv")
    with pytest.raises(StoreError, match=r"no such bucket$"):
        read_bytes("s3://no-bucket-here/none.tsv")


def test_store_errors_name_the_url(s3):
    from timbrel.store import StoreFolder

    with pytest.raises(StoreError, match=r"s3://no-such-bucket/x: no such bucket"):
        StoreFolder("s3://no-such-bucket/x").prepare()


def test_a_denied_write_is_one_line(words):
    with _s3server.start(unchecked_requests=_s3server.READ_ONLY_SETUP_REQUESTS) as admin:
        env = {**os.environ, **_s3server.read_only_user(admin, "read-only-bucket")}
        run = _cli("frames", str(words), "--out", "s3://read-only-bucket/cache", "--quiet",
                   env=env)
    assert run.returncode == 1
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and "s3://read-only-bucket/cache" in lines[0], run.stderr
    assert "access denied" in lines[0]


def test_a_network_drop_mid_run_is_one_line_and_loses_nothing(s3, words, tmp_path):
    import threading
    import time

    port = int(s3["AWS_ENDPOINT_URL_S3"].rsplit(":", 1)[1])
    link = _s3server.CuttableLink(port)
    env = {**os.environ, "AWS_ENDPOINT_URL_S3": f"http://127.0.0.1:{link.port}",
           "AWS_MAX_ATTEMPTS": "2"}
    out = f"s3://{BUCKET}/dropped/cache"
    _s3server.upload_folder(s3, str(words), f"s3://{BUCKET}/dropped/words")
    source = f"s3://{BUCKET}/dropped/words/manifest.csv"

    def cut_after_the_first_shard():
        # watches the server directly (not through the link) for a finished shard
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            if any(k.startswith("shards/") and k.endswith(".json")
                   for k in _s3server.object_bytes(s3, out)):
                link.cut()
                return
            time.sleep(0.01)

    watcher = threading.Thread(target=cut_after_the_first_shard)
    watcher.start()
    # one worker: the files are framed 16 at a time, one shard after another
    run = _cli("frames", source, "--out", out, "--workers", "1", "--quiet",
               "--set", "frontend.n_mels=20", env=env)
    watcher.join()
    assert run.returncode == 1, run.stdout
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and "cannot be reached" in lines[0], run.stderr
    assert "cache.json" not in _s3server.object_bytes(s3, out)  # never reads as complete
    link.restore()
    again = _cli("frames", source, "--out", out, "--workers", "1", "--quiet",
                 "--set", "frontend.n_mels=20", env=env)
    assert again.returncode == 0, again.stderr
    reused = int(re.search(r"\((\d+) reused\)", again.stdout).group(1))
    assert 0 < reused < N_CLIPS, again.stdout  # the shards finished before the drop
    link.cut()
    # a source the store cannot give is the network's fault, not the files': one line
    cut_off = _cli("frames", source, "--out", str(tmp_path / "here"), "--quiet", env=env)
    assert cut_off.returncode == 1
    assert len(cut_off.stderr.strip().splitlines()) == 1, cut_off.stderr
    assert "cannot be reached" in cut_off.stderr and "failed:" not in cut_off.stderr
    # and the cache is whole: every clip's frames as a local build gives them
    local = tmp_path / "cache"
    build_cache(words / "manifest.csv", local, workers=1,
                config=load_config(overrides=["frontend.n_mels=20"]))
    ours, theirs = FrameCache.open(out), FrameCache.open(local)
    assert ours.index.column("source").to_pylist() == theirs.index.column("source").to_pylist()
    for clip in range(len(theirs)):
        np.testing.assert_array_equal(ours.clip_frames(clip), theirs.clip_frames(clip))


def test_frames_on_a_cluster_equal_local_frames(words, cluster, tmp_path):
    config = load_config(overrides=OVERRIDES)
    build_cache(words / "manifest.csv", tmp_path / "here", config=config, workers=1)
    build_cache(words / "manifest.csv", tmp_path / "there", config=config, scheduler=cluster)
    here, there = FrameCache.open(tmp_path / "here"), FrameCache.open(tmp_path / "there")
    layout = ["shard", "offset"]  # how clips are grouped into shards, not what they hold
    assert here.index.drop_columns(layout).equals(there.index.drop_columns(layout))
    assert here.marker["band_stats"] == there.marker["band_stats"]
    for clip in range(len(here)):
        np.testing.assert_array_equal(here.clip_frames(clip), there.clip_frames(clip))
