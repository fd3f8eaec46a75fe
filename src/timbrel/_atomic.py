"""Write files so that a crash never leaves one that reads as complete."""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import IO

from ._errors import OutputError, TimbrelError

TEMP_SUFFIX = ".part"


def os_reason(exc: OSError) -> str:
    """The system's reason for an OSError, as one phrase (``"No space left on device"``)."""
    return exc.strerror or str(exc) or type(exc).__name__


def process_alive(pid: int) -> bool:
    """Whether process ``pid`` of this host still runs (POSIX: signal 0). A process we may
    not signal runs; so, to be safe, does a pid that is not a valid number."""
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except (PermissionError, ValueError, OverflowError):
        return True
    return True


def make_folder(path: str | Path) -> Path:
    """Create an output folder and its parents; a failure is an :class:`OutputError`."""
    path = Path(path)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(path, os_reason(exc)) from None
    return path


@contextlib.contextmanager
def atomic_path(path: str | Path, *,
                guard: Callable[[], contextlib.AbstractContextManager[object]] | None = None
                ) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it onto ``path`` when the block succeeds.

    The temporary file is removed if the block raises. Data are flushed to disk before
    the rename so the rename publishes a complete file. An ``OSError`` while creating,
    writing, flushing or renaming (disk full, I/O error) becomes an :class:`OutputError`
    naming ``path``. ``guard``, if given, makes a context manager that is held around the
    rename (a lock, say); an exception on entering it discards the file instead of
    publishing it.
    """
    path = Path(path)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=TEMP_SUFFIX, dir=path.parent)
    except OSError as exc:
        raise OutputError(path, os_reason(exc)) from None
    os.close(fd)
    tmp_path = Path(tmp)
    # mkstemp makes files private (0600); published outputs get the usual mode instead
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp_path, 0o666 & ~umask)
    try:
        yield tmp_path
        with open(tmp_path, "rb+") as fh:
            os.fsync(fh.fileno())
        with guard() if guard is not None else contextlib.nullcontext():
            os.replace(tmp_path, path)
    except BaseException as exc:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        if isinstance(exc, OSError):
            raise OutputError(path, os_reason(exc)) from None
        raise


@contextlib.contextmanager
def atomic_open(path: str | Path, mode: str = "w", **kwargs: object) -> Iterator[IO]:
    """Open a temporary file beside ``path`` for writing; publish it on success."""
    with atomic_path(path) as tmp, open(tmp, mode, **kwargs) as fh:  # type: ignore[call-overload]
        yield fh


def remove_stale_temporaries(folder: str | Path, *, names: Iterable[str] | None = None) -> int:
    """Delete temporary files a crashed run left in ``folder``; return how many.

    With ``names``, only the temporaries of those output names are deleted (for folders
    the user shares with other files, such as a model file's folder).
    """
    removed = 0
    folder = Path(folder)
    if not folder.is_dir():
        return 0
    prefixes = tuple(f".{name}." for name in names) if names is not None else (".",)
    for entry in folder.iterdir():
        if entry.name.startswith(prefixes) and entry.name.endswith(TEMP_SUFFIX):
            with contextlib.suppress(OSError):
                entry.unlink()
                removed += 1
    return removed


LOCK_NAME = ".lock"
#: Descriptors of the folder locks this process holds; a worker forked from it closes
#: them first thing (``timbrel._workers``), so the lock is the running command's alone.
HELD_LOCK_FDS: set[int] = set()


@contextlib.contextmanager
def folder_lock(folder: str | Path, *, error: type[TimbrelError], busy: str) -> Iterator[None]:
    """Hold an exclusive lock on ``folder/.lock`` for the block; refuse if it is held.

    Two runs writing into one output folder would interleave their files and records.
    The lock is an advisory ``flock``, released by the system when the process ends, so
    a killed run never leaves it held. Workers do not keep it (they close its
    descriptor as they start, and die with the run: see ``timbrel._workers``), so a
    re-run started the moment a run is killed takes it. The file holds the owner's
    process id, which a refusal names. A held lock raises
    ``error(f"{folder}: {busy} (process N)")``.
    """
    import fcntl

    path = Path(folder) / LOCK_NAME
    try:
        fh = open(path, "a+")
    except OSError as exc:
        raise OutputError(path, os_reason(exc)) from None
    fd = fh.fileno()
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            fh.seek(0)
            owner = fh.read().strip()
            raise error(f"{folder}: {busy}" + (f" (process {owner})" if owner.isdigit()
                                               else "")) from None
        HELD_LOCK_FDS.add(fd)
        with contextlib.suppress(OSError):
            fh.seek(0)
            fh.truncate()
            fh.write(f"{os.getpid()}\n")
            fh.flush()
        yield
    finally:
        HELD_LOCK_FDS.discard(fd)
        fh.close()

