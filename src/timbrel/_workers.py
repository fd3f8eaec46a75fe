"""Local worker processes: how they start, and the results of a list of tasks.

Starting a worker by ``spawn`` re-imports numpy, scipy and pyarrow in every process
(0.7 to 2.5 s on a 2-core machine, as long as exporting ten minutes of audio), so on
Linux a pool is forked from the calling process when that process runs no other
Python thread (forking with threads alive can copy a lock held by one of them).
Otherwise a fork server is started once, with the stage modules imported in it, and
the workers are forked from that. Other systems spawn.

A worker never outlives the run that started it. Every worker starts in
:func:`_init_worker`, which asks Linux to send it SIGKILL when its parent dies
(``prctl(PR_SET_PDEATHSIG)``; elsewhere a thread notices the parent is gone), drops
the descriptors of the run's folder locks (so the lock is the running command's
alone) and leaves SIGINT to the parent, which stops the pool. Without this a run
killed by the out-of-memory killer left its workers blocked in the pool's queue for
good, holding the output folder's lock.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import ctypes
import multiprocessing
import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from typing import Any, TypeVar

from ._atomic import HELD_LOCK_FDS, process_alive
from ._errors import WorkerError

Result = TypeVar("Result")

#: Seconds between two looks at the parent in the portable watcher.
WATCH_INTERVAL = 0.2
#: Seconds a stopped pool's workers get to end after SIGTERM before SIGKILL.
STOP_GRACE = 2.0
#: Seconds the main process waits for a result at a time; a signal that came meanwhile
#: takes effect at the end of the step (see :func:`_signals_held`).
WAIT_STEP = 0.1
_PR_SET_PDEATHSIG = 1


class Interrupted(KeyboardInterrupt):
    """A run stopped by SIGINT or SIGTERM after it put its workers down.

    ``kept`` says, in one line, what the run leaves for a re-run; ``signum`` is the
    signal that stopped it (the command line exits with ``128 + signum``).
    """

    def __init__(self, kept: str, signum: int = signal.SIGINT) -> None:
        super().__init__(kept)
        self.kept = kept
        self.signum = signum


def _die_with_parent(main: int) -> None:
    """End this process when its parent ends; ``main`` is the process that made the pool.

    The parent is ``main`` itself (fork, spawn) or a fork server, which ends when
    ``main`` ends (it reads EOF on a pipe from ``main``).
    """
    parent = os.getppid()
    if parent != main and not process_alive(main):
        os._exit(1)  # main died before this worker got here
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            ok = libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0) == 0
        except (OSError, AttributeError):
            ok = False
        if ok:
            # the parent may have died between the look above and prctl: no signal then
            if os.getppid() != parent:
                os._exit(1)
            return
    threading.Thread(target=_watch_parent, args=(parent,), name="timbrel-parent-watch",
                     daemon=True).start()


def _watch_parent(parent: int) -> None:
    # portable fallback: a dead parent's children are handed to another process
    while os.getppid() == parent:
        time.sleep(WATCH_INTERVAL)
    os._exit(1)


def _init_worker(main: int) -> None:
    """Initialiser of every pool worker: die with the run, hold no lock, ignore Ctrl-C."""
    _die_with_parent(main)
    # a forked worker's copy of a lock's descriptor would keep the lock held after
    # the run's death; the lock belongs to the running command alone
    for fd in HELD_LOCK_FDS:
        with contextlib.suppress(OSError):
            os.close(fd)
    HELD_LOCK_FDS.clear()
    # Ctrl-C reaches the whole foreground group; the parent stops the pool on it. A
    # SIGTERM handler the parent installed is not the worker's: SIGTERM ends a worker.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)


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
    progress bar, say) and can still be forked. Leaving the block normally waits for
    running tasks; leaving it by an exception (Ctrl-C, SIGTERM, an error) cancels the
    waiting tasks and ends the workers at once (SIGTERM, then SIGKILL after
    :data:`STOP_GRACE` seconds), so nothing of the run outlives it.

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
    pool = concurrent.futures.ProcessPoolExecutor(
        max_workers=min(workers, len(tasks)), mp_context=context,
        initializer=_init_worker, initargs=(os.getpid(),))
    try:
        futures = [pool.submit(function, task) for task in tasks]
        yield _completed(futures)
    except BaseException:
        _stop(pool)
        raise
    pool.shutdown(wait=True)


def _stop(pool: concurrent.futures.ProcessPoolExecutor) -> None:
    """Cancel what waits and end the workers now, rather than wait for running tasks."""
    # the executor keeps its processes in a private mapping; there is no public way to
    # end a running task
    processes = list(getattr(pool, "_processes", {}).values())
    manager = getattr(pool, "_executor_manager_thread", None)  # shutdown forgets it
    pool.shutdown(wait=False, cancel_futures=True)
    for process in processes:
        with contextlib.suppress(OSError, ValueError):
            process.terminate()
    deadline = time.monotonic() + STOP_GRACE
    for process in processes:
        with contextlib.suppress(ValueError):
            process.join(max(0.0, deadline - time.monotonic()))
            if process.is_alive():
                process.kill()
                # no time limit: a killed process always ends (at worst when a disk
                # write it is blocked in returns), and the caller removes the run's
                # temporaries next, which only holds if no worker can write any more
                process.join()
    # Its workers gone, the pool's manager thread closes its wake-up pipe and ends.
    # CPython 3.11's exit hook for process pools writes to that pipe without the lock the
    # thread closes it under: a run that exited while the thread was closing it printed
    # "Exception ignored in threading._shutdown ... OSError: [Errno 9] Bad file
    # descriptor" after its own last line (about 1 run in 100). Once the thread has ended
    # the hook finds the pipe closed and writes nothing.
    if manager is not None:
        manager.join(STOP_GRACE)


def _completed(futures: list[concurrent.futures.Future]) -> Iterator[Any]:
    from concurrent.futures.process import BrokenProcessPool

    def wait_step(pending: set[Any]) -> tuple[set[Any], set[Any]]:
        done, pending = concurrent.futures.wait(
            pending, timeout=WAIT_STEP, return_when=concurrent.futures.FIRST_COMPLETED)
        return done, pending

    try:
        yield from _results_in_steps(futures, wait_step)
    except BrokenProcessPool:
        raise WorkerError(
            "a worker process stopped abruptly (killed, or out of memory?); the work it had "
            "finished is kept: run the same command again to continue") from None


def _results_in_steps(futures: Sequence[Any],
                      wait_step: Callable[[set[Any]], tuple[set[Any], set[Any]]]
                      ) -> Iterator[Any]:
    """The futures' results as they complete; ``wait_step(pending)`` waits at most
    :data:`WAIT_STEP` seconds and gives ``(done, pending)``.

    Each step runs with the signals held (:func:`_signals_held`); the finished results of
    a step come before a failed task's error, so the caller counts the finished work
    first.
    """
    pending = set(futures)
    while pending:
        with _signals_held():
            done, pending = wait_step(pending)
            outcomes = [_outcome(future) for future in done]  # done: no waiting for a task
        for value, error in sorted(outcomes, key=lambda outcome: outcome[1] is not None):
            if error is not None:
                raise error
            yield value


def _outcome(future: Any) -> tuple[Any, BaseException | None]:
    try:
        return future.result(), None
    except Exception as exc:
        return None, exc


@contextlib.contextmanager
def _signals_held(signums: Sequence[int] = (signal.SIGINT, signal.SIGTERM)) -> Iterator[None]:
    """Hold SIGINT and SIGTERM in the main thread while in the block; on leaving it, give
    each signal that came to the handler that was in place, once.

    Waiting for a result runs Python's ``threading.Condition``, which releases and takes
    back its lock in Python code; a handler that raises there (Ctrl-C's
    ``KeyboardInterrupt``, or the command line's SIGTERM handler) leaves ``with cond:``
    releasing a lock it no longer holds, and the run ended with ``RuntimeError: release
    unlocked lock`` and a traceback instead of stopping its workers. Outside the main
    thread (where no handler runs) this does nothing.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    came: list[int] = []

    def hold(signum: int, frame: Any) -> None:
        came.append(signum)

    previous = {}
    for signum in signums:
        if signal.getsignal(signum) is not None:  # None: a handler not set from Python
            previous[signum] = signal.signal(signum, hold)
    try:
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
        for signum in dict.fromkeys(came):
            signal.raise_signal(signum)  # the restored handler runs here


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


@contextlib.contextmanager
def dask_results(function: Callable[[Any], Result], tasks: Sequence[Any], address: str, *,
                 key: Callable[[Any], str], error: type[Exception]
                 ) -> Iterator[Iterator[Result]]:
    """Run ``function`` on each task on a Dask cluster; results in order of completion.

    Parameters
    ----------
    function : callable
        A module-level function; every worker imports timbrel to run it.
    tasks : sequence
        Picklable arguments, one task each.
    address : str
        The scheduler's address, ``tcp://host:8786``.
    key : callable
        The Dask key of a task (a task run again under the same key is not run twice
        while the cluster still holds it).
    error : type
        The exception raised, with one line, when Dask is missing or the scheduler cannot
        be reached.
    """
    try:
        from distributed import Client
    except ImportError:
        raise error("--scheduler needs the dask extra: pip install 'timbrel[dask]'") from None
    try:
        client = Client(address, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise error(f"cannot reach the Dask scheduler at {address} ({exc})") from None
    with client:
        futures = [client.submit(function, task, key=key(task), pure=False) for task in tasks]
        yield _dask_completed(futures)


def _dask_completed(futures: list[Any]) -> Iterator[Any]:
    """The Dask futures' results as they complete, waiting as :func:`_completed` does
    (the client waits in Python's ``threading`` code too)."""
    from distributed import wait

    def wait_step(pending: set[Any]) -> tuple[set[Any], set[Any]]:
        try:
            done, pending = wait(list(pending), timeout=WAIT_STEP,
                                 return_when="FIRST_COMPLETED")
        except TimeoutError:
            return set(), pending
        return set(done), set(pending)

    return _results_in_steps(futures, wait_step)
