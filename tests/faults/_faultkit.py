"""Shared helpers of the fault suite: small settings, good clips, run readers, comparisons."""

from __future__ import annotations

import csv
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow.dataset as ds
import soundfile as sf
from typer.testing import CliRunner

from timbrel.cache import FrameCache
from timbrel.cli import app

#: Small settings so every run in the suite takes a fraction of a second.
SETTINGS = ["--set", "frontend.n_mels=16", "--set", "frontend.context=1"]
FIT_OPTIONS = ["--n-hidden", "8", "--epochs", "3", "--seed", "5"]
RUNNER = Path(__file__).with_name("_crash_runner.py")
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
    return {src: np.array(cache.clip_frames(i)) for i, src in enumerate(cache.sources())}


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
