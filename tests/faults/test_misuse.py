"""Misuse: manifests reaching outside their folder, two exports into one folder at once, an
output folder holding another model's dataset or the user's own files."""

from __future__ import annotations

import contextlib
import json
import os
import subprocess
import sys
import time

import numpy as np
import pytest
from _faultkit import (
    FIT_OPTIONS,
    RUNNER,
    SETTINGS,
    cache_clips,
    dataset_rows,
    failures,
    invoke,
    no_traceback,
    write_good_clips,
)


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("misuse")
    audio = root / "audio"
    write_good_clips(audio, 20, seconds=0.3)
    (audio / "zz_broken.wav").write_bytes(b"not audio")
    assert invoke("frames", audio, "--out", root / "cache", "-q", "-j", "1",
                  *SETTINGS).exit_code == 0
    for name, seed in (("a.npz", "5"), ("b.npz", "6")):
        assert invoke("fit", root / "cache", "--out", root / name, "-q",
                      *FIT_OPTIONS[:-1], seed).exit_code == 0
        assert invoke("export", audio, "--model", root / name, "--out",
                      root / f"ds-{name[0]}", "-q", "-j", "1").exit_code == 0
    return root


def _one_error(result, fragment: str) -> None:
    no_traceback(result)
    assert result.exit_code == 1, result.output
    lines = [ln for ln in result.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("timbrel: error: "), lines
    assert fragment in lines[0], lines[0]


def _same_rows(path, ref) -> None:
    rows, expected = dataset_rows(path), dataset_rows(ref)
    assert list(rows) == list(expected)
    assert all(np.array_equal(rows[s], expected[s]) for s in expected)


@pytest.mark.parametrize("entry", ["../../etc/passwd", "/etc/passwd", "sub/../../outside.wav",
                                   "link_out.wav"])
def test_manifest_paths_outside_the_root_are_refused(entry, tmp_path, setup):
    # common practice (path traversal): a list of files must not reach outside its folder
    root = tmp_path / "data"
    write_good_clips(root, 2)
    (tmp_path / "outside.wav").write_bytes((root / "good00.wav").read_bytes())
    os.symlink(tmp_path / "outside.wav", root / "link_out.wav")  # resolves outside
    (root / "m.csv").write_text(f"path,label\ngood00.wav,a\n{entry},b\n")
    for args in (["frames", root / "m.csv", "--out", tmp_path / "cache", "-q", *SETTINGS],
                 ["export", root / "m.csv", "--model", setup / "a.npz", "--out",
                  tmp_path / "ds", "-q", "-j", "1"]):
        _one_error(invoke(*args), "leads outside the manifest's folder")
    assert not (tmp_path / "cache" / "cache.json").exists()
    assert not list((tmp_path / "ds").glob("part-*")) if (tmp_path / "ds").exists() else True
    if entry == "/etc/passwd":  # allowed on request: then read, and named as not audio
        result = invoke("frames", root / "m.csv", "--out", tmp_path / "cache", "-q",
                        "--allow-outside", *SETTINGS)
        assert result.exit_code == 0
        assert "not readable as audio" in failures(tmp_path / "cache")["/etc/passwd"]


@contextlib.contextmanager
def _paused(args, fault: str, tmp_path):
    """Run the command in a child that holds still (lock held) at ``fault``; let it go and
    wait for it when the block ends. Yields the child."""
    env = {**os.environ, "FAULT_DIR": str(tmp_path)}
    first = subprocess.Popen([sys.executable, str(RUNNER), fault, *map(str, args)], env=env,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 240
        while not (tmp_path / "paused").exists():
            assert first.poll() is None, first.communicate()
            assert time.monotonic() < deadline
            time.sleep(0.02)
        yield first
    finally:
        (tmp_path / "go").touch()
        _, stderr = first.communicate(timeout=240)
    assert first.returncode == 0, stderr


def test_second_export_into_the_same_folder_is_refused_by_the_lock(tmp_path, setup):
    out = tmp_path / "ds"
    args = ["export", setup / "audio", "--model", setup / "a.npz", "--out", out, "-q", "-j",
            "1"]
    # the first export holds still right after publishing its first part, lock held
    with _paused(args, "pause:after:part-*.parquet:1", tmp_path):
        parts_before = sorted(p.name for p in out.glob("part-*.parquet"))
        assert len(parts_before) == 1
        for extra in ([], ["--overwrite"]):  # not even --overwrite gets past the lock
            _one_error(invoke(*args, *extra), "another export is writing into this folder")
            assert sorted(p.name for p in out.glob("part-*.parquet")) == parts_before
    _same_rows(out, setup / "ds-a")  # not interleaved: exactly the uninterrupted dataset


def test_second_frames_run_into_the_same_cache_is_refused_by_the_lock(tmp_path, setup):
    out = tmp_path / "cache"
    args = ["frames", setup / "audio", "--out", out, "-q", "-j", "1", *SETTINGS]
    # the first run holds still right after publishing its first shard, lock held
    with _paused(args, "pause:after:*.json:1", tmp_path):
        shards_before = sorted(p.name for p in (out / "shards").iterdir())
        _one_error(invoke(*args), "another `frames` run is writing into this cache")
        assert sorted(p.name for p in (out / "shards").iterdir()) == shards_before
    ours, theirs = cache_clips(out), cache_clips(setup / "cache")
    assert list(ours) == list(theirs)
    assert all(np.array_equal(ours[s], theirs[s]) for s in theirs)


@pytest.mark.parametrize("kind", ["folder", "manifest"])
@pytest.mark.parametrize("command", ["frames", "export"])
def test_a_source_without_clips_is_one_error(command, kind, tmp_path, setup):
    # it used to say "0 of 0 files cached" and exit 0
    empty = tmp_path / "empty"
    (empty / "sub").mkdir(parents=True)
    (empty / "notes.txt").write_text("no audio here")
    if kind == "manifest":
        empty = empty / "list.csv"
        empty.write_text("path,label\n")
    args = (["frames", empty, "--out", tmp_path / "out", "-q", *SETTINGS] if command == "frames"
            else ["export", empty, "--model", setup / "a.npz", "--out", tmp_path / "out", "-q"])
    _one_error(invoke(*args), str(empty))
    if kind == "folder":
        _one_error(invoke(*args), "searched for .wav, .flac, .ogg")
    else:
        _one_error(invoke(*args), "the manifest lists no files")


def test_folder_with_another_models_dataset_is_refused_unless_overwrite(tmp_path, setup):
    out = tmp_path / "ds"
    assert invoke("export", setup / "audio", "--model", setup / "a.npz", "--out", out, "-q",
                  "-j", "1").exit_code == 0
    _one_error(invoke("export", setup / "audio", "--model", setup / "b.npz", "--out", out,
                      "-q", "-j", "1"), "holds a dataset of another model")
    _same_rows(out, setup / "ds-a")  # untouched
    result = invoke("export", setup / "audio", "--model", setup / "b.npz", "--out", out, "-q",
                    "-j", "1", "--overwrite")
    assert result.exit_code == 0, result.output
    _same_rows(out, setup / "ds-b")
    assert json.loads((out / "_export.json").read_text())["model"].endswith("b.npz")


@pytest.mark.parametrize("overwrite", [[], ["--overwrite"]], ids=["plain", "overwrite"])
def test_a_folder_of_other_files_is_refused_and_left_alone(overwrite, tmp_path, setup):
    # --out pointed by mistake at a folder of the user's own work: writing parts among
    # them would make Parquet readers take their files for the dataset, and --overwrite
    # must never delete what timbrel did not write
    out = tmp_path / "work"
    (out / "photos").mkdir(parents=True)
    (out / "photos" / "p1.jpg").write_bytes(b"\xff\xd8 jpeg")
    (out / "notes.txt").write_text("thesis draft")
    (out / "old_results.parquet").write_bytes(b"PAR1 someone else's")
    before = sorted(p.relative_to(out) for p in out.rglob("*"))
    _one_error(invoke("export", setup / "audio", "--model", setup / "a.npz", "--out", out,
                      "-q", "-j", "1", *overwrite), "not part of a timbrel dataset")
    assert sorted(p.relative_to(out) for p in out.rglob("*")) == before
    assert (out / "notes.txt").read_text() == "thesis draft"
    assert (out / "photos" / "p1.jpg").is_file()
    assert (out / "old_results.parquet").is_file()


def test_a_second_run_still_names_the_failed_file(tmp_path, setup):
    out = tmp_path / "ds"
    args = ["export", setup / "audio", "--model", setup / "a.npz", "--out", out, "-q", "-j", "1"]
    for _ in range(2):
        result = invoke(*args)
        assert result.exit_code == 0
        assert failures(out) == {"zz_broken.wav": failures(setup / "ds-a")["zz_broken.wav"]}
        assert "failed: zz_broken.wav:" in result.output
    assert json.loads((out / "_export.json").read_text())["n_sources"] == 20
