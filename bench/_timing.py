"""Helpers shared by the benchmarks: interleaved rounds, medians, a scratch folder.

The machines are shared, so a candidate and its reference are timed alternately, round
after round, and the figure of merit is the median over rounds of their ratio: a burst
of load from elsewhere then hits both sides of one ratio instead of one side of all.
"""

from __future__ import annotations

import contextlib
import shutil
import statistics
import tempfile
import time
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path


def interleaved(candidates: Mapping[str, Callable[[], object]], rounds: int, *,
                warm_up: bool = True) -> dict[str, list[float]]:
    """Seconds of each candidate per round, the candidates run in turn within a round."""
    if warm_up:
        for run in candidates.values():
            run()
    times: dict[str, list[float]] = {name: [] for name in candidates}
    for _ in range(rounds):
        for name, run in candidates.items():
            began = time.perf_counter()
            run()
            times[name].append(time.perf_counter() - began)
    return times


def median_ratio(numerator: list[float], denominator: list[float]) -> float:
    """Median over rounds of numerator[i] / denominator[i]."""
    return statistics.median(a / b for a, b in zip(numerator, denominator, strict=True))


def median(values: list[float]) -> float:
    return statistics.median(values)


@contextlib.contextmanager
def scratch_dir(prefix: str, *, keep: bool = False) -> Iterator[Path]:
    """A temporary folder for one benchmark's audio, models and exports (often gigabytes),
    removed when the benchmark ends, also on an error; ``keep`` leaves it and says where."""
    path = Path(tempfile.mkdtemp(prefix=prefix))
    try:
        yield path
    finally:
        if keep:
            print(f"kept the benchmark's files in {path}")
        else:
            shutil.rmtree(path, ignore_errors=True)
