"""One BLAS thread inside each worker task."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator


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
