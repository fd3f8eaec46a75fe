"""Disk full and I/O errors while writing: one clear line naming the path and the reason,
exit code 1, no good input blamed, nothing half-written that reads as whole, and a re-run
once the "disk" has recovered completes and equals a clean run.

The errors are simulated in-process: ``os.fsync`` (fsync(2) reports ENOSPC and EIO for
data the kernel could not write back: Linux man page), the shard file's ``write`` and
pyarrow's ``ParquetWriter.write_table`` raise ``OSError`` for outputs whose name matches.
"""

from __future__ import annotations

import errno
import fnmatch
import os

import numpy as np
import pyarrow.parquet as pq
import pytest
from _faultkit import (
    FIT_OPTIONS,
    SETTINGS,
    cache_clips,
    dataset_rows,
    failures,
    invoke,
    no_traceback,
    temporaries,
    write_good_clips,
)

import timbrel.cache
from timbrel import CacheError
from timbrel.cache import FrameCache
from timbrel.model import read_model_file

pytestmark = pytest.mark.skipif(not os.path.isdir("/proc/self/fd"),
                                reason="finds the file behind a descriptor through /proc")


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    root = tmp_path_factory.mktemp("reference")
    audio = root / "audio"
    write_good_clips(audio, 5)
    (audio / "zz_broken.wav").write_bytes(b"not audio")
    assert invoke("frames", audio, "--out", root / "cache", "-q", "-j", "1",
                  *SETTINGS).exit_code == 0
    assert invoke("fit", root / "cache", "--out", root / "model.npz", "-q",
                  *FIT_OPTIONS).exit_code == 0
    assert invoke("export", audio, "--model", root / "model.npz", "--out", root / "ds", "-q",
                  "-j", "1", "--pool", "mean").exit_code == 0
    return root


def _oserror(code: int) -> OSError:
    return OSError(code, os.strerror(code))


def _fail_fsync(monkeypatch, pattern: str, code: int) -> None:
    real = os.fsync

    def fsync(fd: int) -> None:
        name = os.path.basename(os.readlink(f"/proc/self/fd/{fd}"))
        if fnmatch.fnmatch(name, pattern):
            raise _oserror(code)
        real(fd)

    monkeypatch.setattr(os, "fsync", fsync)


def _one_error_line(result, fragment: str, code: int) -> None:
    no_traceback(result)
    assert result.exit_code == 1, result.output
    lines = [ln for ln in result.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("timbrel: error: "), result.output
    assert fragment in lines[0] and f"cannot write ({os.strerror(code)})" in lines[0], lines[0]


CACHE_FAULTS = [  # what fails, the temporary's name, the error, what the message names
    ("shard data write", "", errno.ENOSPC, "/cache/shards/"),
    ("shard fsync", ".*.f32.*.part", errno.EIO, "/cache/shards/"),
    ("index", ".index-*.parquet.*.part", errno.ENOSPC, "/cache/index-"),
    ("marker", ".cache.json.*.part", errno.EIO, "/cache/cache.json"),
]


@pytest.mark.parametrize(("what", "pattern", "code", "fragment"), CACHE_FAULTS,
                         ids=[f[0] for f in CACHE_FAULTS])
def test_frames_write_error(what, pattern, code, fragment, tmp_path, reference, monkeypatch):
    args = ["frames", reference / "audio", "--out", tmp_path / "cache", "-q", "-j", "1",
            *SETTINGS]
    with monkeypatch.context() as m:
        if what == "shard data write":
            real_open = open

            class FullDisk:  # the shard's file, whose writes fail as on a full disk
                def __init__(self, fh):
                    self._fh = fh

                def write(self, data):
                    raise _oserror(code)

                def __getattr__(self, name):
                    return getattr(self._fh, name)

                def __enter__(self):
                    return self

                def __exit__(self, *exc):
                    return self._fh.__exit__(*exc)

            def failing_open(path, mode="r", *a, **k):
                fh = real_open(path, mode, *a, **k)
                return FullDisk(fh) if "w" in mode and ".f32." in str(path) else fh

            m.setattr(timbrel.cache, "open", failing_open, raising=False)
        else:
            _fail_fsync(m, pattern, code)
        result = invoke(*args)
    _one_error_line(result, fragment, code)
    assert "failed:" not in result.output  # no input file blamed for the disk
    with pytest.raises(CacheError):
        FrameCache.open(tmp_path / "cache")  # never reads as complete
    assert temporaries(tmp_path / "cache") == []
    again = invoke(*args)
    assert again.exit_code == 0, again.output
    clips, expected = cache_clips(tmp_path / "cache"), cache_clips(reference / "cache")
    assert list(clips) == list(expected)
    assert all(np.array_equal(clips[s], expected[s]) for s in expected)
    assert failures(tmp_path / "cache") == failures(reference / "cache")


FIT_FAULTS = [
    ("checkpoint", ".model.npz.checkpoint.npz.*.part", errno.ENOSPC),
    ("history", ".model.npz.history.csv.*.part", errno.EIO),
    ("model", ".model.npz.*.part", errno.ENOSPC),
]


@pytest.mark.parametrize(("what", "pattern", "code"), FIT_FAULTS, ids=[f[0] for f in FIT_FAULTS])
def test_fit_write_error(what, pattern, code, tmp_path, reference, monkeypatch):
    model = tmp_path / "model.npz"
    args = ["fit", reference / "cache", "--out", model, "-q", *FIT_OPTIONS]
    with monkeypatch.context() as m:
        _fail_fsync(m, pattern, code)
        result = invoke(*args)
    _one_error_line(result, f"{tmp_path}/{pattern[1:].split('.*')[0]}", code)
    assert not model.exists() and temporaries(tmp_path) == []
    again = invoke(*args, "--resume")
    assert again.exit_code == 0, again.output
    ours, theirs = read_model_file(model).rbm, read_model_file(reference / "model.npz").rbm
    for name in ("weights_", "visible_bias_", "hidden_bias_", "sigma_"):
        assert np.array_equal(getattr(ours, name), getattr(theirs, name)), name


EXPORT_FAULTS = [
    ("part rows", "part-*.parquet", errno.ENOSPC),
    ("clip part", "._clips", errno.EIO),
    ("run record", "._export.json.*.part", errno.EIO),
]


@pytest.mark.parametrize(("what", "pattern", "code"), EXPORT_FAULTS,
                         ids=[f[0] for f in EXPORT_FAULTS])
def test_export_write_error(what, pattern, code, tmp_path, reference, monkeypatch):
    out = tmp_path / "ds"
    args = ["export", reference / "audio", "--model", reference / "model.npz", "--out", out,
            "-q", "-j", "1", "--pool", "mean"]
    with monkeypatch.context() as m:
        if what == "part rows":
            def write_table(self, *a, **k):
                raise _oserror(code)

            m.setattr(pq.ParquetWriter, "write_table", write_table)
            fragment = f"{out}/part-"
        elif what == "clip part":
            real = os.fsync

            def fsync(fd):
                if "/_clips/" in os.readlink(f"/proc/self/fd/{fd}"):
                    raise _oserror(code)
                real(fd)

            m.setattr(os, "fsync", fsync)
            fragment = f"{out}/_clips/part-"
        else:
            _fail_fsync(m, pattern, code)
            fragment = f"{out}/_export.json"
        result = invoke(*args)
    _one_error_line(result, fragment, code)
    assert "failed:" not in result.output
    assert temporaries(out) == []
    if what != "run record":  # no part that reads as whole: none at all here
        assert list(out.glob("part-*.parquet")) == []
    again = invoke(*args)
    assert again.exit_code == 0, again.output
    rows, expected = dataset_rows(out), dataset_rows(reference / "ds")
    assert list(rows) == list(expected)
    assert all(np.array_equal(rows[s], expected[s]) for s in expected)
    assert failures(out) == failures(reference / "ds")


def test_output_folder_cannot_be_created(tmp_path, reference):
    # a file where the output folder should go: the system refuses mkdir (ENOTDIR/EEXIST)
    (tmp_path / "taken").write_text("a file")
    result = invoke("frames", reference / "audio", "--out", tmp_path / "taken" / "cache", "-q",
                    "-j", "1", *SETTINGS)
    no_traceback(result)
    assert result.exit_code == 1 and "taken" in result.output
