"""Local worker processes: how they start, and the results of a list of tasks.

Starting a worker by ``spawn`` re-imports numpy, scipy and pyarrow in every process
(0.7 to 2.5 s on a 2-core machine, as long as exporting ten minutes of audio), so on
Linux a pool is forked from the calling process when that process runs no other
Python thread (forking with threads alive can copy a lock held by one of them).
Otherwise a fork server is started once, with the stage modules imported in it, and
the workers are forked from that. Other systems spawn.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import multiprocessing
import sys
import threading
from collections.abc import Callable, Iterator, Sequence
from typing import Any, TypeVar

from ._errors import WorkerError

Result = TypeVar("Result")


def start_method() -> str:
    """``"fork"``, ``"forkserver"`` or ``"spawn"``: the cheapest safe way to start a worker.

    Fork is chosen only on Linux and only while this process runs a single Python
    thread; BLAS thread pools are safe to fork (OpenBLAS and MKL reset them in the
    child), a Python thread holding a lock is not.
    """
    methods = multiprocessing.get_all_start_methods()
    if sys.platform.startswith("linux") and "fork" in methods and threading.active_count() == 1:
        return "fork"
    if "forkserver" in methods:
        return "forkserver"
    return "spawn"


@contextlib.contextmanager
def task_results(function: Callable[[Any], Result], tasks: Sequence[Any], workers: int, *,
                 preload: Sequence[str] = ()) -> Iterator[Iterator[Result]]:
    """Run ``function`` on each task and give the results in order of completion.

    With one worker or one task everything runs in this process, one task per step of
    the iterator. Otherwise every task is submitted to a pool of ``workers`` processes
    on entry, so the pool starts before the caller starts any thread of its own (a
    progress bar, say) and can still be forked. Leaving the block waits for running
    tasks and cancels the rest.

    Parameters
    ----------
    function : callable
        A module-level function (it is pickled by reference).
    tasks : sequence
        Picklable arguments, one call each.
    workers : int
        Processes, at least 1.
    preload : sequence of str, default ()
        Modules a fork server imports once before forking workers.
    """
    if workers <= 1 or len(tasks) <= 1:
        yield (function(task) for task in tasks)
        return
    method = start_method()
    context = multiprocessing.get_context(method)
    if method == "forkserver" and preload:
        context.set_forkserver_preload(list(preload))
    with concurrent.futures.ProcessPoolExecutor(max_workers=min(workers, len(tasks)),
                                                mp_context=context) as pool:
        futures = [pool.submit(function, task) for task in tasks]
        try:
            yield _completed(futures)
        finally:
            for future in futures:
                future.cancel()


def _completed(futures: list[concurrent.futures.Future]) -> Iterator[Any]:
    from concurrent.futures.process import BrokenProcessPool

    try:
        for future in concurrent.futures.as_completed(futures):
            yield future.result()
    except BrokenProcessPool:
        raise WorkerError(
            "a worker process stopped abruptly (killed, or out of memory?); the work it had "
            "finished is kept: run the same command again to continue") from None


def even_chunks(items: Sequence[Any], workers: int, *, most: int) -> list[list[Any]]:
    """Split ``items`` in order into chunks of at most ``most``, nearly equal in length.

    At least four chunks per worker when there are enough items, so that a pool's
    workers finish close together (eight files in one task and two in the other
    left one of two workers idle for most of an export).
    """
    n = len(items)
    if n == 0:
        return []
    n_chunks = min(n, max(4 * max(1, workers), -(-n // most)))
    base, extra = divmod(n, n_chunks)
    chunks, start = [], 0
    for index in range(n_chunks):
        stop = start + base + (1 if index < extra else 0)
        chunks.append(list(items[start:stop]))
        start = stop
    return chunks
