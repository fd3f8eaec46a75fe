"""Tests of timbrel._workers: task chunks, the start method, and pooled results."""

from __future__ import annotations

import sys
import threading

import pytest
from hypothesis import given
from hypothesis import strategies as st

from timbrel._workers import even_chunks, start_method, task_results


@given(n=st.integers(0, 500), workers=st.integers(1, 16), most=st.integers(1, 32))
def test_even_chunks_keep_order_and_balance(n, workers, most):
    items = list(range(n))
    chunks = even_chunks(items, workers, most=most)
    assert [x for chunk in chunks for x in chunk] == items
    sizes = [len(c) for c in chunks]
    assert all(1 <= s <= most for s in sizes)
    assert not sizes or max(sizes) - min(sizes) <= 1
    # enough tasks for every worker to get several when there are enough items
    assert len(chunks) >= min(n, 4 * workers)


def test_ten_files_on_two_workers_become_small_tasks():
    # the export benchmark's case: 8 + 2 files left one worker idle most of the time
    sizes = [len(c) for c in even_chunks(list(range(10)), 2, most=8)]
    assert len(sizes) == 8 and max(sizes) == 2


def test_start_method_forks_only_without_other_threads():
    assert start_method() in ("fork", "forkserver", "spawn")
    release = threading.Event()
    thread = threading.Thread(target=release.wait)
    thread.start()
    try:
        assert start_method() != "fork"
    finally:
        release.set()
        thread.join()


def _square(x: int) -> int:
    return x * x


@pytest.mark.parametrize("workers", [1, 2])
def test_task_results_equal_a_plain_loop(workers):
    tasks = list(range(7))
    with task_results(_square, tasks, workers) as results:
        got = sorted(results)
    assert got == [x * x for x in tasks]


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork is used on Linux only")
def test_task_results_run_in_other_processes():
    import os

    with task_results(_pid, [0, 1, 2, 3], 2) as results:
        pids = set(results)
    assert os.getpid() not in pids


def _pid(_: int) -> int:
    import os

    return os.getpid()


def _die_on_three(x: int) -> int:
    import os
    import signal
    import time

    if x == 3:
        os.kill(os.getpid(), signal.SIGKILL)  # as the kernel's out-of-memory killer would
    time.sleep(0.05)
    return x


def test_a_killed_worker_is_one_clear_error_not_a_traceback():
    from timbrel import TimbrelError, WorkerError

    with pytest.raises(WorkerError, match=r"worker process stopped abruptly.*run the same"):
        with task_results(_die_on_three, list(range(8)), 2) as results:
            list(results)
    assert issubclass(WorkerError, TimbrelError)  # so the command line prints one line
