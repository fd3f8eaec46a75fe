"""Shared helpers of the fault suite: small settings, good clips, run readers, comparisons."""

from __future__ import annotations

import contextlib
import csv
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow.dataset as ds
import pytest
import soundfile as sf
from typer.testing import CliRunner

from timbrel.cache import FrameCache
from timbrel.cli import app

#: Small settings so every run in the suite takes a fraction of a second.
SETTINGS = ["--set", "frontend.n_mels=16", "--set", "frontend.context=1"]
FIT_OPTIONS = ["--n-hidden", "8", "--epochs", "3", "--seed", "5"]
RUNNER = Path(__file__).with_name("_crash_runner.py")
#: Good clips of the crash tests' reference runs: > 16 files per frames task and > 8 per
#: export task, so several shards and parts
N_GOOD = 20
EXPORT_OPTIONS = ["--pool", "mean,max"]
SR = 16000

runner = CliRunner()


def write_good_clips(folder: Path, n: int = 3, *, seconds: float = 0.4, seed: int = 0
                     ) -> list[str]:
    """``n`` short mono 16 kHz clips (a tone plus noise, a different tone each)."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    t = np.arange(int(SR * seconds)) / SR
    names = []
    for i in range(n):
        y = 0.3 * np.sin(2 * np.pi * (300 + 170 * i) * t) + 0.02 * rng.standard_normal(t.size)
        name = f"good{i:02d}.wav"
        sf.write(folder / name, y.astype(np.float32), SR, subtype="PCM_16")
        names.append(name)
    return names


def invoke(*args: str):
    """Run the command line in-process; the result has ``exit_code``, ``output``, ``exception``."""
    return runner.invoke(app, [str(a) for a in args])


def no_traceback(result) -> None:
    """A run ended by the package's own handling: no exception escaped, no traceback printed."""
    assert result.exception is None or isinstance(result.exception, SystemExit), \
        f"unexpected {type(result.exception).__name__}: {result.exception}\n{result.output}"
    assert "Traceback" not in result.output, result.output


def run_child(args: list[str], *, fault: str | None = None, cwd: Path | None = None,
              user: int | None = None, timeout: float = 300) -> subprocess.CompletedProcess:
    """Run the command line in a real child process, optionally with a fault injected."""
    drop = ["--as-user", str(user)] if user is not None else []
    cmd = [sys.executable, str(RUNNER), *drop, fault or "none", *[os.fsdecode(a) for a in args]]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, cwd=cwd)


def cache_clips(path: Path) -> dict[str, np.ndarray]:
    """Every clip's frames of a complete cache, by source."""
    cache = FrameCache.open(path)
    names = cache.index.column("source").to_pylist()
    return {src: np.array(cache.clip_frames(i)) for i, src in enumerate(names)}


def failures(path: Path) -> dict[str, str]:
    """The failures file of a cache (``failures.csv``) or dataset (``_failures.csv``)."""
    name = "failures.csv" if (path / "failures.csv").is_file() else "_failures.csv"
    with open(path / name, newline="", encoding="utf-8") as fh:
        return {row["source"]: row["reason"] for row in csv.DictReader(fh)}


def dataset_rows(path: Path) -> dict[str, np.ndarray]:
    """Every frame's features of a dataset, by source, in frame order."""
    table = ds.dataset(path, format="parquet").to_table(columns=["source", "frame", "features"])
    table = table.sort_by([("source", "ascending"), ("frame", "ascending")])
    sources = np.asarray(table.column("source").to_pylist(), dtype=object)
    frames = np.asarray(table.column("frame").to_numpy())
    feats = np.asarray(table.column("features").combine_chunks().flatten().to_numpy())
    feats = feats.reshape(len(sources), -1) if len(sources) else feats.reshape(0, 0)
    out = {}
    for src in dict.fromkeys(sources.tolist()):
        rows = sources == src
        assert np.array_equal(frames[rows], np.arange(rows.sum())), f"{src}: frames not 0..n-1"
        out[src] = feats[rows]
    return out


def temporaries(folder: Path) -> list[Path]:
    """Files a write-then-rename left behind (``.NAME.*.part`` / ``.partial``) under ``folder``."""
    return sorted(p for p in folder.rglob(".*")
                  if p.name.endswith((".part", ".partial")))


def live_group_members(group: int) -> list[int]:
    """Processes of process group ``group`` still running (zombies, which hold no
    descriptors and run nothing, are left out). Linux only: reads /proc."""
    members = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as fh:
                # "pid (comm) state ppid pgrp ...": comm may hold spaces or ")"
                fields = fh.read().rsplit(")", 1)[1].split()
        except OSError:  # the process ended while we looked
            continue
        if int(fields[2]) == group and fields[0] != "Z":
            members.append(int(entry))
    return members


def group_end_seconds(group: int, *, within: float) -> float:
    """Seconds until no process of ``group`` runs, looked at every 10 ms; fails after
    ``within`` seconds (and then SIGKILLs what is left, so no test leaves processes)."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < within:
        if not live_group_members(group):
            return time.monotonic() - t0
        time.sleep(0.01)
    left = live_group_members(group)
    for pid in left:
        with contextlib.suppress(OSError):
            os.kill(pid, signal.SIGKILL)
    raise AssertionError(f"processes {left} of the run's group {group} still alive "
                         f"{within} s after the run ended")


def same_cache(path, ref) -> None:
    """The cache at ``path`` equals the one at ``ref``, with nothing left over."""
    clips, expected = cache_clips(path), cache_clips(ref)
    assert list(clips) == list(expected)
    for src in expected:
        assert np.array_equal(clips[src], expected[src]), src
    assert failures(path) == failures(ref)
    ours, theirs = FrameCache.open(path).marker, FrameCache.open(ref).marker
    assert ours["band_stats"] == theirs["band_stats"]
    assert (ours["n_clips"], ours["n_frames"]) == (theirs["n_clips"], theirs["n_frames"])
    # nothing left over: no temporaries, every shard on disk is one the index uses
    assert temporaries(path) == []
    used = set(FrameCache.open(path).index.column("shard").to_pylist())
    on_disk = {p.stem for p in (path / "shards").iterdir()}
    assert on_disk == used


def same_dataset(path, ref) -> None:
    """The dataset at ``path`` equals the one at ``ref``: every frame exactly once."""
    rows, expected = dataset_rows(path), dataset_rows(ref)
    assert list(rows) == list(expected)
    for src in expected:
        assert np.array_equal(rows[src], expected[src]), src
    clips = ds.dataset(path / "_clips").to_table().sort_by("source")
    assert clips.equals(ds.dataset(ref / "_clips").to_table().sort_by("source"))
    assert failures(path) == failures(ref)
    record = json.loads((path / "_export.json").read_text())
    assert record["complete"] and record["n_sources"] == N_GOOD
    assert temporaries(path) == []
    frame_parts = {p.name for p in path.glob("part-*.parquet")}
    assert {p.name for p in (path / "_clips").glob("part-*.parquet")} == frame_parts


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """Uninterrupted runs over 20 good clips and one bad file. A test module uses it by
    ``reference = _faultkit.reference`` (a conftest.py here would shadow tests/conftest.py
    under pytest's module names)."""
    root = tmp_path_factory.mktemp("reference")
    audio = root / "audio"
    write_good_clips(audio, N_GOOD, seconds=0.3)
    (audio / "zz_broken.wav").write_bytes(b"RIFF not really")
    assert invoke("frames", audio, "--out", root / "cache", "-q", "-j", "1",
                  *SETTINGS).exit_code == 0
    assert invoke("fit", root / "cache", "--out", root / "model.npz", "-q",
                  *FIT_OPTIONS).exit_code == 0
    assert invoke("export", audio, "--model", root / "model.npz", "--out", root / "ds", "-q",
                  "-j", "1", *EXPORT_OPTIONS).exit_code == 0
    return root
