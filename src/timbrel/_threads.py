"""Worker processes: a local pool of tasks, one BLAS thread inside each task."""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from typing import Any


@contextlib.contextmanager
def single_blas_thread() -> Iterator[None]:
    """Limit BLAS and OpenMP pools to one thread for the block, then restore them.

    Worker processes already use every core, and a fixed thread count makes matrix
    products sum in the same order in-process, in a local pool and on a Dask worker,
    so features are bit-identical whichever backend computed them.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl is a dependency
        yield
        return
    with threadpool_limits(1):
        yield


def run_tasks(function: Callable[[dict[str, Any]], dict[str, Any]],
              tasks: list[dict[str, Any]], workers: int) -> Iterator[dict[str, Any]]:
    """Run ``function`` on each task, in this process (``workers == 1`` or one task) or in
    a "spawn" process pool; yield results as tasks finish.

    If a task raises, the tasks still queued are cancelled and the error propagates.
    """
    if workers == 1 or len(tasks) <= 1:
        for task in tasks:
            yield function(task)
        return
    import concurrent.futures
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    with concurrent.futures.ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as ex:
        futures = [ex.submit(function, task) for task in tasks]
        try:
            for future in concurrent.futures.as_completed(futures):
                yield future.result()
        except BaseException:
            # a task failed (disk full, ...): do not start the ones still queued
            ex.shutdown(wait=True, cancel_futures=True)
            raise
