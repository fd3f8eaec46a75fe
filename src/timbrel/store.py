"""Object stores: every place that takes a folder or file also takes a URL.

A path with a scheme other than ``file://`` (``s3://bucket/prefix/``, ``memory://...``,
any protocol `fsspec <https://filesystem-spec.readthedocs.io>`_ knows) is handled here;
a plain path or a ``file://`` URL stays on the local code path, with its renames and
locks. Credentials and endpoints come from where the store's own library looks: for
S3, the standard ``AWS_*`` environment variables and ``~/.aws`` files, and
``AWS_ENDPOINT_URL_S3`` (or ``AWS_ENDPOINT_URL``) for an S3-compatible service. They are
never taken from the command line.

An object store has no rename, so the promise that nothing half-written reads as whole
is kept another way: each object is written complete from a local temporary file (a
store shows an object whole or not at all) and the record that says a folder is
complete is written last. Failures of the store become one :class:`StoreError` line
naming the URL and the reason (no such bucket, no credentials, access denied, the
store unreachable).

Two folder kinds share one small interface, :class:`Folder`: :class:`LocalFolder`
(temporaries renamed into place, ``flock`` locks) and :class:`StoreFolder`.
"""

from __future__ import annotations

import contextlib
import fnmatch
import json
import os
import posixpath
import re
import socket
import tempfile
import time
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from ._atomic import (
    atomic_path,
    folder_lock,
    make_folder,
    os_reason,
    process_alive,
    remove_stale_temporaries,
)
from ._errors import ParameterError, TimbrelError

__all__ = ["Folder", "LocalFolder", "StoreError", "StoreFolder", "StoreUnreachable",
           "filesystem", "folder",
           "is_url", "join", "local_copy", "parent", "stat_key"]

UNREACHABLE = "the store cannot be reached"
_SCHEME = re.compile(r"^([a-zA-Z][a-zA-Z0-9+.-]*)://")


class StoreError(TimbrelError):
    """An object store refused or failed a request (no bucket, no credentials, denied,
    unreachable). The message is one line naming the URL and the reason."""


class StoreUnreachable(StoreError):
    """The store could not be reached (a network drop, a timeout): never one input file's
    fault, so it stops a run instead of being listed as a failed file."""


def is_url(path: object) -> bool:
    """True for a URL an fsspec file system handles (``s3://``, ``memory://``, ...);
    False for a local path and for ``file://`` URLs.

    Examples
    --------
    >>> is_url("s3://bucket/cache"), is_url("out/cache"), is_url("file:///tmp/x")
    (True, False, False)
    """
    match = _SCHEME.match(os.fspath(path)) if isinstance(path, (str, os.PathLike)) else None
    return bool(match) and match.group(1).lower() != "file"  # type: ignore[union-attr]


def local(path: str | os.PathLike[str]) -> Path:
    """A local path, from a plain path or a ``file://`` URL."""
    text = os.fspath(path)
    return Path(text[len("file://"):] if text.lower().startswith("file://") else text)


def join(base: str, *names: str) -> str:
    """``base/name/...`` with ``/`` separators, for URLs and local paths alike."""
    return posixpath.join(base.rstrip("/") if is_url(base) else base, *names)


def parent(url: str) -> str:
    """The URL of the folder holding ``url``."""
    return url.rstrip("/").rsplit("/", 1)[0]


def filesystem(url: str) -> tuple[Any, str]:
    """The fsspec file system of a URL and the path inside it.

    Raises
    ------
    StoreError
        If the protocol is unknown or its library is missing (for ``s3://``: the
        ``store`` extra, ``pip install 'timbrel[store]'``).
    """
    try:
        import fsspec
    except ImportError:  # pragma: no cover - fsspec is a dependency
        raise StoreError(f"{url}: URLs need fsspec (pip install 'timbrel[store]')") from None
    try:
        fs, path = fsspec.core.url_to_fs(url)
    except ImportError as exc:
        raise StoreError(f"{url}: this store needs a library that is not installed ({exc}); "
                         "pip install 'timbrel[store]'") from None
    except ValueError as exc:
        raise StoreError(f"{url}: not a usable URL ({exc})") from None
    return fs, path


def _reason(exc: BaseException) -> str:
    """One phrase for a store failure, by the kind of exception the store library raised."""
    name = type(exc).__name__
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else name
    if name in ("NoCredentialsError", "PartialCredentialsError"):
        return ("no credentials found (set AWS_ACCESS_KEY_ID and AWS_SECRET_ACCESS_KEY, "
                "or AWS_PROFILE with ~/.aws/credentials)")
    if isinstance(exc, PermissionError) or "AccessDenied" in text or "Forbidden" in text:
        return f"access denied ({text})"
    # s3fs says "The specified bucket does not exist" (S3's NoSuchBucket) for a missing
    # bucket and gives only the path for a missing object, whose name may hold "bucket"
    if isinstance(exc, FileNotFoundError) and ("NoSuchBucket" in text or
                                               "bucket does not exist" in text.lower()):
        return "no such bucket"
    if isinstance(exc, FileNotFoundError):
        return "no such object"
    if name.startswith(("EndpointConnectionError", "ConnectTimeout", "ReadTimeout",
                        "ConnectionClosed", "ClientConnector", "ServerDisconnected",
                        "ClientPayloadError", "ResponseStreamingError", "IncompleteRead")) or \
            isinstance(exc, (ConnectionError, TimeoutError)):
        return f"{UNREACHABLE} ({text})"
    if isinstance(exc, OSError):
        return os_reason(exc)
    return f"{name}: {text}"


#: Exceptions a store library raises for a failed request, besides OSError.
def _store_exceptions() -> tuple[type[BaseException], ...]:
    kinds: list[type[BaseException]] = [OSError, TimeoutError]
    with contextlib.suppress(ImportError):
        from botocore.exceptions import BotoCoreError, ClientError
        kinds += [BotoCoreError, ClientError]
    with contextlib.suppress(ImportError):
        from aiohttp import ClientError as HttpError
        kinds.append(HttpError)
    return tuple(kinds)


@contextlib.contextmanager
def errors(url: str, doing: str = "") -> Iterator[None]:
    """Turn a store library's failure inside the block into one :class:`StoreError`."""
    try:
        yield
    except TimbrelError:
        raise
    except _store_exceptions() as exc:
        what = f"cannot {doing}: " if doing else ""
        reason = _reason(exc)
        kind = StoreUnreachable if reason.startswith(UNREACHABLE) else StoreError
        raise kind(f"{url}: {what}{reason}") from None


def stat_key(url: str) -> tuple[int, int]:
    """(size in bytes, modification time in ns) of an object: what tells a re-run that an
    input changed. Stores without a time give 0."""
    fs, path = filesystem(url)
    with errors(url, "read"):
        info = fs.info(path)
    when = info.get("LastModified") or info.get("mtime") or info.get("created") or 0
    if hasattr(when, "timestamp"):
        when = when.timestamp()
    return int(info.get("size") or 0), int(float(when) * 1e9)


@contextlib.contextmanager
def local_copy(path: str | os.PathLike[str]) -> Iterator[Path]:
    """A local file with the contents of ``path``: the path itself, or a temporary
    download of a URL, removed when the block ends (decoders read local files)."""
    text = os.fspath(path)
    if not is_url(text):
        yield local(text)
        return
    fs, inner = filesystem(text)
    suffix = posixpath.splitext(inner)[1]
    fd, tmp = tempfile.mkstemp(prefix="timbrel-", suffix=suffix)
    os.close(fd)
    try:
        with errors(text, "read"):
            fs.get_file(inner, tmp)
        yield Path(tmp)
    finally:
        with contextlib.suppress(OSError):
            os.unlink(tmp)


def list_files(url: str) -> list[str]:
    """URLs of every object under a prefix, sorted."""
    fs, root = filesystem(url)
    with errors(url, "list"):
        found = fs.find(root)
    base, root = url.rstrip("/"), root.rstrip("/")
    return sorted(base + p[len(root):] for p in found if p.startswith(root + "/"))


def arrow_location(location: str | os.PathLike[str]) -> tuple[str, Any]:
    """A path and file system for pyarrow (``pyarrow.dataset.dataset(path,
    filesystem=fs)``): the local path and None, or the path inside a store and its
    fsspec file system (which pyarrow wraps)."""
    text = os.fspath(location)
    if not is_url(text):
        return os.fspath(local(text)), None
    fs, path = filesystem(text)
    return path, fs


def absolute(location: str | os.PathLike[str]) -> str:
    """A local path made absolute, or a URL as given: how records name a location."""
    text = os.fspath(location)
    return text if is_url(text) else os.fsdecode(local(text).absolute())


def read_bytes(url: str) -> bytes:
    """The whole object at a URL (or a local file)."""
    if not is_url(url):
        return local(url).read_bytes()
    fs, path = filesystem(url)
    with errors(url, "read"):
        return fs.cat_file(path)


def exists(url: str) -> bool:
    """Whether a URL names an existing object or prefix (or a local path exists)."""
    if not is_url(url):
        return local(url).exists()
    fs, path = filesystem(url)
    with errors(url, "read"):
        return bool(fs.exists(path))


Guard = Callable[[], contextlib.AbstractContextManager[object]]


@contextlib.contextmanager
def writing_file(url: str, *, guard: Guard | None = None) -> Iterator[Path]:
    """A local temporary path to write; published whole at ``url`` when the block ends
    without error (renamed into place for a local path, uploaded for a URL). ``guard``,
    if given, makes a context manager held around the publishing step (see
    :func:`timbrel._atomic.atomic_path`)."""
    if not is_url(url):
        with atomic_path(local(url), guard=guard) as staged:
            yield staged
        return
    fs, path = filesystem(url)
    fd, tmp = tempfile.mkstemp(prefix="timbrel-", suffix=".upload")
    os.close(fd)
    try:
        yield Path(tmp)
        with guard() if guard is not None else contextlib.nullcontext(), \
                errors(url, "write"):
            fs.put_file(tmp, path)
    finally:
        with contextlib.suppress(OSError):
            os.unlink(tmp)


class Folder:
    """An output folder: local (:class:`LocalFolder`) or in a store (:class:`StoreFolder`).

    Names are relative to the folder, with ``/`` separators (``shards/ab12.f32``).
    """

    location: str

    @property
    def where(self) -> Path | str:
        """The folder as callers name it: a local ``Path``, or the URL."""
        return self.location

    def url(self, name: str) -> str:
        """The path or URL of a member, for messages and for other processes."""
        return join(self.location, name)

    def writing(self, name: str, *, guard: Guard | None = None
                ) -> contextlib.AbstractContextManager[Path]:
        """A local temporary path to write ``name`` to; published whole on success
        (``guard`` as in :func:`writing_file`)."""
        return writing_file(self.url(name), guard=guard)

    def reader(self, name: str) -> contextlib.AbstractContextManager[Any]:
        """Something pyarrow reads a member from (a path, or a seekable remote file)."""
        raise NotImplementedError

    def entries(self) -> list[str]:
        """Names of the folder's top-level members, files and subfolders."""
        raise NotImplementedError

    def short_lock(self, name: str) -> contextlib.AbstractContextManager[None]:
        """A brief exclusive section between the processes sharing a local folder (a
        blocking ``flock`` on ``name``). A store offers none: a no-op there."""
        return contextlib.nullcontext()

    def read_bytes(self, name: str) -> bytes:
        """A member's whole contents."""
        raise NotImplementedError

    def read_range(self, name: str, start: int, stop: int) -> bytes:
        """Bytes ``[start, stop)`` of a member."""
        raise NotImplementedError

    def size(self, name: str) -> int | None:
        """A member's size in bytes, or None if it does not exist."""
        raise NotImplementedError

    def names(self, pattern: str) -> list[str]:
        """Sorted member names matching a glob pattern (``shards/*.json``)."""
        raise NotImplementedError

    def remove(self, name: str) -> None:
        """Delete a member if it exists; failures are ignored (clean-up only)."""
        raise NotImplementedError

    def prepare(self, *subfolders: str) -> None:
        """Make the folder usable for writing (create it; check a bucket exists)."""
        raise NotImplementedError

    def clean_temporaries(self, *subfolders: str) -> None:
        """Delete temporaries a crashed run left."""

    def lock(self, *, error: type[TimbrelError], busy: str
             ) -> contextlib.AbstractContextManager[None]:
        """Hold the folder's writer lock for the block; refuse if another run holds it."""
        raise NotImplementedError


class LocalFolder(Folder):
    """A folder on a local (or network-mounted) file system."""

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = local(path)
        self.location = os.fspath(self.path)

    @property
    def where(self) -> Path | str:
        return self.path

    def url(self, name: str) -> str:
        return os.fspath(self.path / name)

    def file(self, name: str) -> Path:
        """The local path of a member (memory maps read it in place)."""
        return self.path / name

    def writing(self, name: str, *, guard: Guard | None = None
                ) -> contextlib.AbstractContextManager[Path]:
        return atomic_path(self.path / name, guard=guard)

    def reader(self, name: str) -> contextlib.AbstractContextManager[Any]:
        return contextlib.nullcontext(os.fspath(self.path / name))

    def entries(self) -> list[str]:
        return sorted(e.name for e in self.path.iterdir()) if self.path.is_dir() else []

    @contextlib.contextmanager
    def short_lock(self, name: str) -> Iterator[None]:
        import fcntl

        with open(self.path / name, "a") as fh:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
            try:
                yield
            finally:
                fcntl.flock(fh.fileno(), fcntl.LOCK_UN)

    def read_bytes(self, name: str) -> bytes:
        return (self.path / name).read_bytes()

    def read_range(self, name: str, start: int, stop: int) -> bytes:
        with open(self.path / name, "rb") as fh:
            fh.seek(start)
            return fh.read(stop - start)

    def size(self, name: str) -> int | None:
        try:
            return (self.path / name).stat().st_size
        except OSError:
            return None

    def names(self, pattern: str) -> list[str]:
        return sorted(p.relative_to(self.path).as_posix() for p in self.path.glob(pattern)
                      if p.is_file())

    def remove(self, name: str) -> None:
        with contextlib.suppress(OSError):
            (self.path / name).unlink()

    def prepare(self, *subfolders: str) -> None:
        make_folder(self.path)
        for sub in subfolders:
            make_folder(self.path / sub)

    def clean_temporaries(self, *subfolders: str) -> None:
        remove_stale_temporaries(self.path)
        for sub in subfolders:
            remove_stale_temporaries(self.path / sub)

    def lock(self, *, error: type[TimbrelError], busy: str
             ) -> contextlib.AbstractContextManager[None]:
        return folder_lock(self.path, error=error, busy=busy)


#: Stores whose first path component is a bucket that must exist before writing.
BUCKET_PROTOCOLS = {"s3", "s3a", "gs", "gcs", "abfs", "az"}

#: The writer lock of a folder in a store: an object naming its owner.
STORE_LOCK = ".lock.json"


class StoreFolder(Folder):
    """A folder (a key prefix) in an object store.

    Members are whole objects, each uploaded complete from a local temporary file. The
    writer lock is an object naming its owner (host, process, start time): a run refuses
    a folder another live run holds; a lock whose owner process is gone (same host) is
    taken over, so a killed run never blocks its re-run. A store has no atomic
    create-if-absent that every S3-compatible service offers, so two runs started in the
    same instant from different hosts can both win; the lock guards against mistakes,
    not races.
    """

    def __init__(self, url: str) -> None:
        self.location = url.rstrip("/")
        self.fs, self.root = filesystem(self.location)

    def _key(self, name: str) -> str:
        return posixpath.join(self.root, name)

    @contextlib.contextmanager
    def reader(self, name: str) -> Iterator[Any]:
        with errors(self.url(name), "read"):
            fh = self.fs.open(self._key(name), "rb")
        with fh:
            yield fh

    def entries(self) -> list[str]:
        with errors(self.location, "list"):
            self.fs.invalidate_cache()
            try:
                found = self.fs.ls(self.root, detail=False)
            except FileNotFoundError:
                return []
        return sorted(posixpath.basename(p.rstrip("/")) for p in found)

    def read_bytes(self, name: str) -> bytes:
        with errors(self.url(name), "read"):
            return self.fs.cat_file(self._key(name))

    def read_range(self, name: str, start: int, stop: int) -> bytes:
        with errors(self.url(name), "read"):
            return self.fs.cat_file(self._key(name), start=start, end=stop)

    def size(self, name: str) -> int | None:
        try:
            with errors(self.url(name), "read"):
                # another process may have written it since this one last listed
                self.fs.invalidate_cache(posixpath.dirname(self._key(name)))
                return int(self.fs.size(self._key(name)))
        except StoreError as exc:
            if str(exc).endswith("no such object"):
                return None
            raise

    def names(self, pattern: str) -> list[str]:
        top = pattern.split("*", 1)[0].rsplit("/", 1)[0] if "/" in pattern else ""
        with errors(self.location, "list"):
            self.fs.invalidate_cache()
            try:
                found = self.fs.find(self._key(top) if top else self.root)
            except FileNotFoundError:
                return []
        prefix = self.root.rstrip("/") + "/"
        rel = [p[len(prefix):] for p in found if p.startswith(prefix)]
        return sorted(n for n in rel if fnmatch.fnmatchcase(n, pattern)
                      and n.count("/") == pattern.count("/"))

    def remove(self, name: str) -> None:
        with contextlib.suppress(*_store_exceptions()):
            self.fs.rm_file(self._key(name))

    def prepare(self, *subfolders: str) -> None:
        protocols = self.fs.protocol if isinstance(self.fs.protocol, tuple) else (
            self.fs.protocol,)
        if not set(protocols) & BUCKET_PROTOCOLS:
            return  # prefixes need no creating
        bucket = self.root.split("/", 1)[0]
        with errors(self.location, "write"):
            try:
                self.fs.info(bucket)
            except FileNotFoundError:
                raise StoreError(f"{self.location}: no such bucket ({bucket}); create it "
                                 "first") from None

    @contextlib.contextmanager
    def lock(self, *, error: type[TimbrelError], busy: str) -> Iterator[None]:
        mine = {"host": socket.gethostname(), "pid": os.getpid(), "token": uuid.uuid4().hex,
                "started": time.time()}
        held = self._lock_owner()
        if held is not None and not _owner_gone(held):
            raise error(f"{self.location}: {busy} (process {held.get('pid')} on "
                        f"{held.get('host')}; delete {self.url(STORE_LOCK)} if that run is "
                        "gone)")
        with self.writing(STORE_LOCK) as tmp:
            tmp.write_text(json.dumps(mine), encoding="utf-8")
        try:
            yield
        finally:
            if (self._lock_owner() or {}).get("token") == mine["token"]:
                self.remove(STORE_LOCK)

    def _lock_owner(self) -> dict[str, Any] | None:
        if self.size(STORE_LOCK) is None:
            return None
        try:
            return dict(json.loads(self.read_bytes(STORE_LOCK)))
        except (ValueError, TypeError, StoreError):
            return None


def _owner_gone(owner: dict[str, Any]) -> bool:
    """True when a lock's owner was a process of this host that no longer runs."""
    if owner.get("host") != socket.gethostname():
        return False
    return not process_alive(owner.get("pid", 0))


def folder(location: str | os.PathLike[str]) -> Folder:
    """The :class:`Folder` of a local path, ``file://`` URL or store URL."""
    text = os.fspath(location)
    return StoreFolder(text) if is_url(text) else LocalFolder(text)


def output_folder(location: str | os.PathLike[str]) -> Folder:
    """The :class:`Folder` a run writes into; a local file in its place is refused.

    Raises
    ------
    ParameterError
        If ``location`` is a local path that exists and is not a folder.
    """
    dest = folder(location)
    if isinstance(dest, LocalFolder) and dest.path.exists() and not dest.path.is_dir():
        raise ParameterError(f"{os.fspath(location)}: output exists and is not a folder")
    return dest
