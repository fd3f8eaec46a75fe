"""Faults planted in the worker processes of a loopback Dask cluster (sent there by value
with ``Client.run``): slow part publishing, and one worker's SIGKILL at a part."""

from __future__ import annotations


def plant(flag_dir: str, delay: float, kill: bool) -> None:
    """Wrap ``os.replace`` in this worker: wait ``delay`` s before publishing a part file;
    with ``kill``, the first worker of the cluster to get there SIGKILLs itself instead
    (a flag file made with O_EXCL picks that one worker, once)."""
    import fnmatch
    import os
    import signal
    import time

    if getattr(os.replace, "planted", False):
        return
    real_replace = os.replace

    def replace(src, dst, *args, **kwargs):  # type: ignore[no-untyped-def]
        if fnmatch.fnmatch(os.path.basename(os.fsdecode(dst)), "part-*.parquet"):
            time.sleep(delay)
            if kill:
                try:
                    os.close(os.open(os.path.join(flag_dir, "killed"),
                                     os.O_CREAT | os.O_EXCL | os.O_WRONLY))
                except FileExistsError:
                    pass
                else:
                    os.kill(os.getpid(), signal.SIGKILL)
        return real_replace(src, dst, *args, **kwargs)

    replace.planted = True  # type: ignore[attr-defined]
    os.replace = replace


def busy(dask_worker) -> int:  # type: ignore[no-untyped-def]
    """Tasks this worker is running (a killed client's tasks run on to their end)."""
    return len(dask_worker.state.executing)
