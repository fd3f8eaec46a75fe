"""Tests of timbrel.cache: frames computed once, reused, bad files named, nothing half-written."""

from __future__ import annotations

import csv
import json
import os

import numpy as np
import pyarrow.parquet as pq
import pytest
import soundfile as sf

from timbrel import BandStats, CacheError, FrontEnd, ParameterError
from timbrel.audio import load
from timbrel.cache import FrameCache, build_cache
from timbrel.config import Config, load_config


def _write_set(folder, rng, n=6, rates=(16000, 44100, 22050)):
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(n):
        sr = rates[i % len(rates)]
        seconds = 0.5 + 0.25 * i
        channels = 1 + i % 2
        y = 0.2 * rng.standard_normal((int(sr * seconds), channels))
        sf.write(folder / f"clip{i:02d}.wav", y.clip(-1, 1), sr)


@pytest.fixture
def rng():
    return np.random.default_rng(11)


@pytest.fixture
def audio_dir(tmp_path, rng):
    folder = tmp_path / "audio"
    _write_set(folder, rng)
    (folder / "broken.wav").write_bytes(b"RIFF....WAVEfmt garbage")
    (folder / "empty.flac").write_bytes(b"")
    sf.write(folder / "tiny.wav", np.zeros(100, np.float32), 16000)
    return folder


@pytest.mark.parametrize("workers", [1, 2])
def test_cache_holds_the_front_ends_frames(tmp_path, audio_dir, workers):
    summary = build_cache(audio_dir, tmp_path / "cache", workers=workers)
    assert (summary.n_files, summary.n_clips, summary.n_failed) == (9, 6, 3)
    cache = FrameCache.open(tmp_path / "cache")
    fe = FrontEnd(cache.config.frontend)
    assert cache.index.column("source").to_pylist() == [f"clip{i:02d}.wav" for i in range(6)]
    for clip, src in enumerate(cache.index.column("source").to_pylist()):
        y = load(audio_dir / src, sr=16000)
        expected = fe.frames(y, 16000)
        got = cache.clip_frames(clip)
        assert got.dtype == np.float32 and not got.flags.writeable
        np.testing.assert_allclose(got, expected, atol=1e-5)
    # frame count predicted from the duration at the front end's rate
    durations = cache.index.column("duration_s").to_numpy()
    predicted = [fe.n_frames(round(d * 16000)) for d in durations]
    assert np.abs(cache.frame_counts - predicted).max() <= 1
    assert summary.n_frames == cache.n_frames


def test_band_stats_equal_numpy_over_all_frames(tmp_path, audio_dir):
    build_cache(audio_dir, tmp_path / "cache", workers=1)
    cache = FrameCache.open(tmp_path / "cache")
    frames = np.concatenate([cache.clip_frames(i) for i in range(len(cache))]).astype(np.float64)
    stats = cache.band_stats
    assert isinstance(stats, BandStats) and stats.count == len(frames)
    np.testing.assert_allclose(stats.mean, frames.mean(axis=0), rtol=1e-9)
    np.testing.assert_allclose(stats.std, frames.std(axis=0), rtol=1e-7)


def test_failures_are_named_with_reasons_and_good_files_kept(tmp_path, audio_dir):
    summary = build_cache(audio_dir, tmp_path / "cache", workers=1)
    with open(tmp_path / "cache" / "failures.csv", newline="") as fh:
        rows = {r["source"]: r["reason"] for r in csv.DictReader(fh)}
    assert set(rows) == {"broken.wav", "empty.flac", "tiny.wav"}
    assert "empty file" in rows["empty.flac"]
    assert "not readable as audio" in rows["broken.wav"]
    assert "shorter than one analysis window" in rows["tiny.wav"]
    assert "3 FAILED" in summary.line()


def test_rerun_reuses_unchanged_clips_and_redoes_changed_ones(tmp_path, audio_dir, rng):
    out = tmp_path / "cache"
    build_cache(audio_dir, out, workers=1)
    before = FrameCache.open(out)
    again = build_cache(audio_dir, out, workers=1)
    assert again.n_reused == 6
    # change one file (new content, new mtime): only it is framed again
    sf.write(audio_dir / "clip03.wav", 0.1 * rng.standard_normal(16000), 16000)
    os.utime(audio_dir / "clip03.wav", ns=(1, 10**18))
    third = build_cache(audio_dir, out, workers=1)
    assert third.n_reused == 5
    after = FrameCache.open(out)
    np.testing.assert_array_equal(after.clip_frames(0), before.clip_frames(0))
    assert after.frame_counts[3] == FrontEnd().n_frames(16000)
    # removing a file drops it; unreferenced shards are deleted
    (audio_dir / "clip05.wav").unlink()
    build_cache(audio_dir, out, workers=1)
    final = FrameCache.open(out)
    assert "clip05.wav" not in final.index.column("source").to_pylist()
    shards = {p.stem for p in (out / "shards").glob("*.f32")}
    assert shards == set(final.index.column("shard").to_pylist())
    assert len(list(out.glob("index-*.parquet"))) == 1


def test_changed_frame_settings_recompute_everything(tmp_path, audio_dir):
    out = tmp_path / "cache"
    build_cache(audio_dir, out, workers=1)
    summary = build_cache(audio_dir, out, workers=1,
                          config=load_config(overrides=["frontend.n_mels=24"]))
    assert summary.n_reused == 0
    assert FrameCache.open(out).clip_frames(0).shape[1] == 24
    # context does not change frames, so a context change reuses them
    summary = build_cache(audio_dir, out, workers=1,
                          config=load_config(overrides=["frontend.n_mels=24",
                                                        "frontend.context=1"]))
    assert summary.n_reused == 6


def test_manifest_columns_are_carried_into_the_index(tmp_path, rng):
    _write_set(tmp_path / "clips", rng, n=3)
    manifest = tmp_path / "manifest.csv"
    manifest.write_text("path,label,split\nclips/clip02.wav,owl,test\n"
                        "clips/clip00.wav,frog,train\nclips/clip01.wav,owl,train\n")
    build_cache(manifest, tmp_path / "cache", workers=1)
    cache = FrameCache.open(tmp_path / "cache")
    assert cache.extra_columns == ["label", "split"]
    table = pq.read_table(tmp_path / "cache" / cache.marker["index"])  # outside reader: pyarrow
    assert table.column("source").to_pylist() == ["clips/clip02.wav", "clips/clip00.wav",
                                                  "clips/clip01.wav"]
    assert table.column("label").to_pylist() == ["owl", "frog", "owl"]


def test_a_run_that_never_finished_does_not_read_as_complete(tmp_path, audio_dir):
    out = tmp_path / "cache"
    build_cache(audio_dir, out, workers=1)
    (out / "cache.json").unlink()  # as if killed before the marker was renamed into place
    with pytest.raises(CacheError, match="not a complete frame cache"):
        FrameCache.open(out)
    # the finished shards are still reused by the next run
    assert build_cache(audio_dir, out, workers=1).n_reused == 6


def test_damaged_caches_are_refused(tmp_path, audio_dir):
    out = tmp_path / "cache"
    build_cache(audio_dir, out, workers=1)
    with pytest.raises(CacheError, match="no such frame cache"):
        FrameCache.open(tmp_path / "elsewhere")
    marker = json.loads((out / "cache.json").read_text())
    marker["version"] = 99
    (out / "cache.json").write_text(json.dumps(marker))
    with pytest.raises(CacheError, match="newer"):
        FrameCache.open(out)
    marker["version"] = 1
    (out / "cache.json").write_text(json.dumps(marker))
    shard = next((out / "shards").glob("*.f32"))
    with open(shard, "r+b") as fh:
        fh.truncate(100)
    with pytest.raises(CacheError, match="shorter than its index"):
        FrameCache.open(out)


def test_output_must_be_a_folder(tmp_path, audio_dir):
    (tmp_path / "file").write_text("x")
    with pytest.raises(ParameterError, match="not a folder"):
        build_cache(audio_dir, tmp_path / "file")


def test_no_temporary_files_remain(tmp_path, audio_dir):
    out = tmp_path / "cache"
    build_cache(audio_dir, out, workers=2, config=Config())
    leftovers = [p for p in out.rglob("*") if p.name.endswith(".part")]
    assert leftovers == []


def test_second_concurrent_run_is_refused_by_the_lock_and_changes_nothing(tmp_path, audio_dir):
    import fcntl

    out = tmp_path / "cache"
    build_cache(audio_dir, out, workers=1)
    before = {p.relative_to(out): p.stat().st_mtime_ns for p in out.rglob("*")}
    with open(out / ".lock", "a+") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)  # as a running `frames` holds it
        with pytest.raises(CacheError, match="lock held"):
            build_cache(audio_dir, out, workers=1)
    assert {p.relative_to(out): p.stat().st_mtime_ns for p in out.rglob("*")} == before
    # released with its holder: the next run proceeds and reuses every clip
    assert build_cache(audio_dir, out, workers=1).n_reused == 6
