"""SIGKILL during frames, fit and export, then the same command again: the cache, model and
dataset end complete and equal to an uninterrupted run, and no temporary file remains.

Kill points are found deterministically: a runner (``_crash_runner.py``) wraps
``os.replace`` (every output is published by a rename) and ``RBM.fit_epoch`` in the
child only and sends itself SIGKILL at the chosen moment; two more runs are killed from
outside (``killpg`` with SIGKILL) once the first finished shard or part appears. SIGKILL
cannot be caught (POSIX), so none of timbrel's cleanup runs.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import _faultkit
import numpy as np
import pytest
from _faultkit import (
    EXPORT_OPTIONS,
    FIT_OPTIONS,
    RUNNER,
    SETTINGS,
    invoke,
    run_child,
    same_cache,
    same_dataset,
    temporaries,
)

from timbrel import CacheError
from timbrel.cache import FrameCache
from timbrel.model import read_model_file

reference = _faultkit.reference  # the shared fixture


def _killed(proc: subprocess.CompletedProcess) -> None:
    assert proc.returncode == -signal.SIGKILL, (proc.returncode, proc.stdout, proc.stderr)


FRAMES_KILLS = [
    "kill:before:*.f32:1",          # first shard written under its temporary name
    "kill:after:*.f32:1",           # first shard published, its clip list not yet
    "kill:after:*.json:1",          # first shard and its clip list published
    "kill:after:*.json:2",          # every shard published, no index
    "kill:after:index-*.parquet:1",  # index published, no failures file, no marker
    "kill:after:failures.csv:1",    # everything but the marker
    "kill:before:cache.json:1",     # marker written under its temporary name
    "kill:after:cache.json:1",      # marker published, old files not yet collected
]


@pytest.mark.parametrize("fault", FRAMES_KILLS)
def test_frames_killed_then_run_again(fault, tmp_path, reference):
    args = ["frames", reference / "audio", "--out", tmp_path / "cache", "-q", "-j", "1",
            *SETTINGS]
    _killed(run_child(args, fault=fault))
    if "cache.json" not in fault or "before" in fault:
        with pytest.raises(CacheError, match="not a complete frame cache"):
            FrameCache.open(tmp_path / "cache")  # never reads as complete
    result = invoke(*args)
    assert result.exit_code == 0, result.output
    same_cache(tmp_path / "cache", reference / "cache")


def _same_model(path, ref) -> None:
    ours, theirs = read_model_file(path), read_model_file(ref)
    for name in ("weights_", "visible_bias_", "hidden_bias_", "sigma_"):
        assert np.array_equal(getattr(ours.rbm, name), getattr(theirs.rbm, name)), name
    for name in ("band_mean", "band_scale"):
        assert np.array_equal(ours.arrays[name], theirs.arrays[name])
    assert len(ours.rbm.history_) == len(theirs.rbm.history_)
    assert temporaries(path.parent) == []


FIT_KILLS = [
    "kill:epoch:-:0",                      # mid-epoch, before the first checkpoint
    "kill:before:*.checkpoint.npz:2",      # second checkpoint written, not yet published
    "kill:after:*.checkpoint.npz:2",       # second checkpoint published, history not yet
    "kill:epoch:-:2",                      # mid-epoch, between the 2nd and 3rd checkpoints
    "kill:before:model.npz:1",             # model file written, not yet published
]


@pytest.mark.parametrize("resume", [True, False], ids=["resume", "again"])
@pytest.mark.parametrize("fault", FIT_KILLS)
def test_fit_killed_then_run_again(fault, resume, tmp_path, reference):
    model = tmp_path / "m" / "model.npz"
    args = ["fit", reference / "cache", "--out", model, "-q", *FIT_OPTIONS]
    _killed(run_child(args, fault=fault))
    assert not model.exists()
    result = invoke(*args, *(["--resume"] if resume else []))
    assert result.exit_code == 0, result.output
    _same_model(model, reference / "model.npz")


EXPORT_KILLS = [
    "kill:after:_export.json:1",      # run record written, no part yet
    "kill:after:part-*.parquet:1",    # first clip-table part published, its frame part not
    "kill:before:part-*.parquet:2",   # first frame part written, not yet published
    "kill:after:part-*.parquet:2",    # first task's parts both published
    "kill:after:part-*.parquet:5",    # third task's clip part published
    "kill:after:_failures.csv:1",     # every part published, record not marked complete
    "kill:before:_export.json:2",     # final record written, not yet published
]


@pytest.mark.parametrize("fault", EXPORT_KILLS)
def test_export_killed_then_run_again(fault, tmp_path, reference):
    args = ["export", reference / "audio", "--model", reference / "model.npz", "--out",
            tmp_path / "ds", "-q", "-j", "1", *EXPORT_OPTIONS]
    _killed(run_child(args, fault=fault))
    result = invoke(*args)
    assert result.exit_code == 0, result.output
    same_dataset(tmp_path / "ds", reference / "ds")


def _kill_when(args, ready, timeout=240.0) -> None:
    """Run the command with two worker processes; SIGKILL its whole process group as soon
    as ``ready()`` is true. The caller re-runs at once: the workers hold no lock."""
    proc = subprocess.Popen([sys.executable, str(RUNNER), "none", *map(str, args)],
                            start_new_session=True, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + timeout
    try:
        while not ready():
            assert proc.poll() is None, "the run finished before the kill point"
            assert time.monotonic() < deadline, "kill point never reached"
            time.sleep(0.01)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()


def test_frames_with_workers_killed_from_outside(tmp_path, reference):
    out = tmp_path / "cache"
    args = ["frames", reference / "audio", "--out", out, "-q", "-j", "2", *SETTINGS]
    _kill_when(args, lambda: any((out / "shards").glob("*.json")))
    result = invoke(*args)
    assert result.exit_code == 0, result.output
    same_cache(out, reference / "cache")


def test_export_with_workers_killed_from_outside(tmp_path, reference):
    out = tmp_path / "ds"
    args = ["export", reference / "audio", "--model", reference / "model.npz", "--out", out,
            "-q", "-j", "2", *EXPORT_OPTIONS]
    _kill_when(args, lambda: any(out.glob("part-*.parquet")))
    result = invoke(*args)
    assert result.exit_code == 0, result.output
    same_dataset(out, reference / "ds")


def test_kill_points_counted():
    # 8 in frames, 5 in fit (each rerun twice: --resume and plain), 7 in export, 2 external
    assert len(FRAMES_KILLS) + len(FIT_KILLS) + len(EXPORT_KILLS) + 2 == 22
