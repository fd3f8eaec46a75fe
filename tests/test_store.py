"""store.py: one folder interface over local disk and fsspec stores.

The store side runs on fsspec's in-memory file system (``memory://``), a real fsspec
implementation; the S3 side is tested against a real server in test_object_store.py.
Both folder kinds must behave alike, so most checks run on each.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import uuid

import pytest

from timbrel._errors import CacheError, ParameterError
from timbrel.store import (
    STORE_LOCK,
    LocalFolder,
    StoreError,
    StoreFolder,
    folder,
    is_url,
    join,
    local,
    output_folder,
    parent,
)


@pytest.fixture(params=["local", "memory"])
def place(request, tmp_path):
    if request.param == "local":
        return LocalFolder(tmp_path / "out")
    return StoreFolder(f"memory://timbrel-test-{uuid.uuid4().hex}/out")


def test_urls_and_paths_are_told_apart():
    assert is_url("s3://bucket/x") and is_url("memory://a") and is_url("gs://b/c")
    assert not is_url("out/cache") and not is_url("/tmp/x") and not is_url("file:///tmp/x")
    assert not is_url("C:/data")
    assert local("file:///tmp/x") == local("/tmp/x")
    assert join("s3://b/p/", "shards", "a.f32") == "s3://b/p/shards/a.f32"
    assert parent("s3://b/p/m.csv") == "s3://b/p"
    assert isinstance(folder("s3://b/p"), StoreFolder)
    assert isinstance(folder("file:///tmp/p"), LocalFolder)


def test_an_output_folder_may_not_be_a_file(tmp_path):
    # frames and export write into the folder this gives; a file in its place is refused
    # before anything is written, a missing or existing folder is fine
    (tmp_path / "file").write_text("x")
    with pytest.raises(ParameterError, match=r"file: output exists and is not a folder"):
        output_folder(tmp_path / "file")
    assert (tmp_path / "file").read_text() == "x"
    assert isinstance(output_folder(tmp_path / "new"), LocalFolder)
    assert not (tmp_path / "new").exists()
    assert isinstance(output_folder(tmp_path), LocalFolder)
    assert isinstance(output_folder("memory://bucket/out"), StoreFolder)


def test_a_member_is_published_whole_or_not_at_all(place):
    place.prepare("shards")
    with place.writing("shards/a.bin") as tmp:
        tmp.write_bytes(b"0123456789")
    assert place.read_bytes("shards/a.bin") == b"0123456789"
    assert place.read_range("shards/a.bin", 2, 5) == b"234"
    assert place.size("shards/a.bin") == 10
    with pytest.raises(RuntimeError), place.writing("shards/b.bin") as tmp:
        tmp.write_bytes(b"half")
        raise RuntimeError("crash while writing")
    assert place.size("shards/b.bin") is None
    assert place.names("shards/*.bin") == ["shards/a.bin"]


def test_names_match_one_level_and_remove_is_quiet(place):
    place.prepare("sub")
    for name in ("part-1.parquet", "part-2.parquet", "sub/part-3.parquet", "other.txt"):
        with place.writing(name) as tmp:
            tmp.write_bytes(b"x")
    assert place.names("part-*.parquet") == ["part-1.parquet", "part-2.parquet"]
    assert place.names("sub/part-*.parquet") == ["sub/part-3.parquet"]
    assert {"part-1.parquet", "sub", "other.txt"} <= set(place.entries())
    place.remove("part-1.parquet")
    place.remove("never-there")
    assert place.names("part-*.parquet") == ["part-2.parquet"]


def test_a_guard_that_refuses_keeps_the_member_unpublished(place):
    place.prepare()

    class Refused(Exception):
        pass

    def guard():
        raise Refused

    with pytest.raises(Refused), place.writing("a.bin", guard=guard) as tmp:
        tmp.write_bytes(b"x")
    assert place.size("a.bin") is None


def test_the_lock_refuses_a_second_writer_and_is_released(place):
    place.prepare()
    with place.lock(error=CacheError, busy="busy"):
        with pytest.raises(CacheError, match="busy"), place.lock(error=CacheError, busy="busy"):
            pass
    with place.lock(error=CacheError, busy="busy"):  # released: taken again
        pass


def test_a_store_lock_of_a_dead_process_is_taken_over():
    place = StoreFolder(f"memory://timbrel-test-{uuid.uuid4().hex}/out")
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    import socket

    with place.writing(STORE_LOCK) as tmp:
        tmp.write_text(json.dumps({"host": socket.gethostname(), "pid": int(gone.stdout),
                                   "token": "old"}))
    with place.lock(error=CacheError, busy="busy"):
        assert json.loads(place.read_bytes(STORE_LOCK))["pid"] == os.getpid()
    assert place.size(STORE_LOCK) is None
    # another host's lock is never guessed dead
    with place.writing(STORE_LOCK) as tmp:
        tmp.write_text(json.dumps({"host": "elsewhere", "pid": 1, "token": "x"}))
    with pytest.raises(CacheError, match=r"on elsewhere; delete memory://.*\.lock\.json"):
        with place.lock(error=CacheError, busy="busy"):
            pass


def test_an_unknown_protocol_is_one_error():
    with pytest.raises(StoreError, match="nosuchproto://x"):
        StoreFolder("nosuchproto://x")


def test_sources_at_a_url_are_listed_with_names_relative_to_it(tmp_path):
    import fsspec

    from timbrel.audio import discover

    base = f"memory://timbrel-test-{uuid.uuid4().hex}/sounds"
    fs = fsspec.filesystem("memory")
    for name in ("b/two.wav", "a/one.flac", "notes.txt"):
        fs.pipe(f"{base}/{name}", b"x")
    items, extra = discover(base)
    assert [i.source for i in items] == ["a/one.flac", "b/two.wav"] and extra == []
    assert items[0].path == f"{base}/a/one.flac"
    fs.pipe(f"{base}/m.csv", b"path,label\na/one.flac,x\nb/../b/two.wav,y\n")
    items, extra = discover(f"{base}/m.csv")
    assert [(i.source, i.path, i.extra["label"]) for i in items] == [
        ("a/one.flac", f"{base}/a/one.flac", "x"), ("b/two.wav", f"{base}/b/two.wav", "y")]
    fs.pipe(f"{base}/out.csv", b"path\n../elsewhere.wav\n")
    from timbrel._errors import ParameterError

    with pytest.raises(ParameterError, match="leads outside the manifest's folder"):
        discover(f"{base}/out.csv")


@pytest.mark.parametrize("make, kind, reason", [
    (lambda: __import__("botocore.exceptions").exceptions.EndpointConnectionError(
        endpoint_url="http://127.0.0.1:1"), "StoreUnreachable", "the store cannot be reached"),
    (lambda: __import__("botocore.exceptions").exceptions.NoCredentialsError(),
     "StoreError", "no credentials found"),
    (lambda: PermissionError("Access Denied"), "StoreError", "access denied"),
    (lambda: FileNotFoundError("The specified bucket does not exist"), "StoreError",
     "no such bucket"),
    (lambda: ConnectionResetError(104, "Connection reset by peer"), "StoreUnreachable",
     "the store cannot be reached"),
])
def test_a_store_failure_becomes_one_line_of_its_kind(make, kind, reason):
    # the exception types botocore and the OS raise for these failures
    pytest.importorskip("botocore")
    from timbrel import store

    with pytest.raises(StoreError) as caught, store.errors("s3://b/x", "read"):
        raise make()
    assert type(caught.value).__name__ == kind
    assert str(caught.value).startswith(f"s3://b/x: cannot read: {reason}")
    assert "\n" not in str(caught.value)
